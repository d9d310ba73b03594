"""The demo: a staff survey of the Alderbank Water Cooperative, a fictional organisation.

The data are invented (numpy's seeded generator; fine for demo data, never used for
release noise).  ``run_demo`` writes the data, privatizes it with the example policy,
estimates from the extract as a partner would, and validates the release as the steward.
"""

from __future__ import annotations

import shutil
from collections.abc import Callable
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from rich.console import Console

DEMO_ROWS = 12000
DEMO_SEED = 20260415
SITES = ["North Works", "Riverside", "Old Mill", "Harbour Lab", "Head Office"]
ROLES = ["Field crew", "Laboratory", "Engineering", "Administration", "Management"]


def make_survey(rows: int = DEMO_ROWS, seed: int = DEMO_SEED) -> pd.DataFrame:
    """The invented survey table (deterministic for a given seed)."""
    rng = np.random.default_rng(seed)
    site = rng.choice(SITES + ["Lakeside Depot"], size=rows, p=[0.28, 0.24, 0.17, 0.12, 0.17, 0.02])
    role_p = {"Head Office": [0.05, 0.05, 0.25, 0.45, 0.20], "Harbour Lab": [0.10, 0.60, 0.15, 0.10, 0.05]}
    role = np.empty(rows, dtype=object)
    for s in np.unique(site):
        idx = np.flatnonzero(site == s)
        role[idx] = rng.choice(ROLES, size=idx.size, p=role_p.get(s, [0.55, 0.10, 0.17, 0.10, 0.08]))
    base = {"Field crew": 38000, "Laboratory": 47000, "Engineering": 61000, "Administration": 41000,
            "Management": 78000}
    tenure = np.round(np.minimum(rng.gamma(1.6, 5.5, size=rows), 44.5), 1)
    pay = np.array([base[r] for r in role]) * np.exp(rng.normal(0, 0.18, rows)) * (1 + 0.012 * tenure)
    pay = np.round(pay, -2)
    pay[rng.random(rows) < 0.004] = 162000.0  # a few above the policy's bound: clipped
    hours = np.round(np.clip(rng.normal(39, 6, rows) + (role == "Field crew") * 4, 8, 68), 1)
    hours_s = pd.Series(hours, dtype="float64")
    hours_s[rng.random(rows) < 0.03] = np.nan
    sat_p = np.where(np.isin(role, ["Field crew"]), 0.0, 0.4)
    sat = np.clip(np.round(rng.normal(3.3 + sat_p, 1.0, rows)), 1, 5).astype(int).astype(str).astype(object)
    sat[rng.random(rows) < 0.05] = None
    sat_num = pd.to_numeric(pd.Series(sat), errors="coerce").fillna(3).to_numpy()
    recommend = np.where(rng.random(rows) < 0.15 + 0.15 * sat_num, "yes", "no")
    return pd.DataFrame({
        "staff_id": [f"AWC-{i:05d}" for i in rng.permutation(rows) + 10001],
        "site": site, "role": role, "pay": pay, "weekly_hours": hours_s, "tenure_years": tenure,
        "satisfaction": sat, "would_recommend": recommend, "survey_wave": "2026-spring",
    })


def bundled_policy(name: str = "staff_survey.yaml") -> Path:
    """The example policy shipped with the package (or the checkout's policies/ folder)."""
    repo = Path(__file__).resolve().parent.parent / "policies" / name
    if repo.exists():
        return repo
    res = resources.files("ldptransform") / "_bundled" / "policies" / name
    with resources.as_file(res) as p:
        return Path(p)


def run_demo(folder: Path, out: Console, err: Console, nonce: str | None = None,
             show_estimates: Callable[[Any], None] | None = None) -> int:
    """Run the demo in ``folder``; ``show_estimates`` renders the partner's ``EstimateResult``
    (the command line passes its table renderer; default: the long frame as text)."""
    from .estimate import estimate
    from .keys import load_key, new_key_file
    from .policy import load_policy
    from .release import privatize
    from .validate import validate

    folder = Path(folder)
    steward, partner = folder / "steward-private", folder / "for-partner"
    for d in (folder, partner):
        d.mkdir(parents=True, exist_ok=True)
    steward.mkdir(parents=True, exist_ok=True, mode=0o700)
    raw = steward / "staff_survey.csv"
    make_survey().to_csv(raw, index=False)
    policy_path = folder / "staff_survey.yaml"
    shutil.copyfile(bundled_policy(), policy_path)
    key_path = steward / "demo.key"
    key = load_key(key_path) if key_path.exists() else new_key_file(key_path)
    lp = load_policy(policy_path)
    extract = partner / "staff_survey_extract.parquet"
    res = privatize(raw, lp, key, extract, diagnostics_path=steward / "release.PRIVATE-diagnostics.json",
                    overwrite=True, nonce=nonce)
    out.print(f"1. privatized {res.manifest.rows} rows of the invented survey {raw} under {policy_path}", markup=False)
    out.print(f"   extract {extract} and manifest {res.manifest_path} (for the partner)", markup=False)
    out.print(f"   steward-only: key {key_path}, diagnostics {res.diagnostics_path}", markup=False)
    out.print("2. the partner's estimates from the extract alone:", markup=False)
    result = estimate(extract)
    if show_estimates is not None:
        show_estimates(result)
    else:
        out.print(result.to_frame().drop(columns=["estimand"]).to_string(index=False), markup=False)
    from .cli import json_text  # strict JSON, as every --format json output

    (partner / "estimates.json").write_text(json_text(result.to_dict()))
    out.print("3. the steward's validation, with the raw data and the key:", markup=False)
    rep = validate(extract, raw=raw, key=key)
    for c in rep.checks:
        out.print(f"   {c.status:4}  {c.name}: {c.detail}", markup=False)
    out.print(f"done: everything is under {folder}/ (estimates also in {partner / 'estimates.json'}).", markup=False)
    out.print("Cautions: eps is a policy choice; the public column survey_wave is NOT protected; linkage with other "
              "data can expose people. Real releases follow local law and your privacy officer's review.")
    return 0 if rep.ok else 1
