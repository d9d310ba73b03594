"""ldptransform: release row-level extracts under local differential privacy.

Public Python API::

    from ldptransform import load_policy, load_key, privatize, estimate, validate
    policy = load_policy("policy.yaml")
    key = load_key("release.key")
    result = privatize("survey.csv", policy, key, "extract.parquet")   # or a pandas DataFrame, a pyarrow
                                                    # Table or RecordBatchReader; idempotent=True for nightly jobs
    frame, manifest = privatize_to_memory(df, policy, key)  # the privatized table in memory (docs/python-api.md)
    figures = estimate("extract.parquet")          # EstimateResult: .to_dict() as `--format json`, .to_frame()
    report = validate("extract.parquet")           # report.ok, report.checks
    problems = check_data("policy.yaml", "survey.csv")  # steward only: the policy against the raw table
"""

from ._version import __version__
from .datacheck import check_data
from .errors import LdptError
from .estimate import estimate
from .keys import SecretKey, load_key, new_key_file
from .memory import InMemoryRelease, privatize_to_memory
from .perrow import read_estimates
from .policy import load_policy, parse_policy
from .release import privatize
from .report import release_report
from .validate import validate

__all__ = [
           "InMemoryRelease",
           "LdptError",
           "SecretKey",
           "__version__",
           "check_data",
           "estimate",
           "load_key",
           "load_policy",
           "new_key_file",
           "parse_policy",
           "privatize",
           "privatize_to_memory",
           "read_estimates",
           "release_report",
           "validate",
]
