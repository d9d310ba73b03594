"""ldptransform: release row-level extracts under local differential privacy.

Public Python API::

    from ldptransform import load_policy, load_key, privatize, estimate, validate
    policy = load_policy("policy.yaml")
    key = load_key("release.key")
    result = privatize("survey.csv", policy, key, "extract.parquet")
    figures = estimate("extract.parquet")          # dict, same shape as `ldpt estimate --format json`
    report = validate("extract.parquet")           # report.ok, report.checks
"""

__version__ = "0.1.0"

from .errors import LdptError  # noqa: E402
from .estimate import estimate  # noqa: E402
from .keys import SecretKey, load_key, new_key_file  # noqa: E402
from .policy import load_policy, parse_policy  # noqa: E402
from .release import privatize  # noqa: E402
from .validate import validate  # noqa: E402

__all__ = ["__version__", "LdptError", "SecretKey", "load_key", "new_key_file", "load_policy", "parse_policy",
           "privatize", "estimate", "validate"]
