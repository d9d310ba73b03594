"""Writes demo_data/staff_survey.csv: the invented 2026 staff survey of the Alderbank
Water Cooperative (a fictional organisation).  Run: .venv/bin/python demo_data/make_staff_survey.py"""

from pathlib import Path

from ldptransform.demo import make_survey

if __name__ == "__main__":
    out = Path(__file__).with_name("staff_survey.csv")
    make_survey().to_csv(out, index=False)
    print(f"wrote {out}")
