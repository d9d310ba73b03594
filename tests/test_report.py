"""`ldpt report` / ``release_report``: one self-contained HTML file people can read.

Checked: the HTML parses with balanced tags; every image is an inline PNG that decodes; nothing
refers outside the file (no scripts, links, remote sources or CSS urls); the privacy statement
gives e^eps per column as the manifest says; every column has its section with its estimand and
the estimates `estimate` gives; a cross-tab is drawn; the quality checks are marked; the steward's
report (raw table and key) holds the truth, is marked steward-only, is written 0600 and is refused
beside the partner's files; the CLI's exit codes.  Where Debian's chromium is installed the report
is also rendered headless to a screenshot (skipped, with the reason, where it is not).

Data: the demo's invented staff survey (a fictional organisation), made by numpy's seeded
generator; a fixed key and nonce.
"""

from __future__ import annotations

import base64
import html.parser
import io
import math
import re
import shutil
import stat
import subprocess
from pathlib import Path

import pytest

from ldptransform.demo import bundled_policy, make_survey
from ldptransform.errors import LdptError
from ldptransform.estimate import estimate
from ldptransform.keys import SecretKey
from ldptransform.manifest import default_manifest_path, load_manifest
from ldptransform.policy import load_policy
from ldptransform.release import privatize
from ldptransform.report import release_report

KEY = SecretKey(bytes(range(40, 72)))
VOID = {"meta", "img", "br", "hr", "input", "link"}


@pytest.fixture(scope="module")
def release(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    base = tmp_path_factory.mktemp("report")
    steward, partner = base / "steward", base / "partner"
    steward.mkdir(mode=0o700)
    partner.mkdir()
    raw = steward / "survey.csv"
    make_survey(rows=3000).to_csv(raw, index=False)
    extract = partner / "survey.parquet"
    mp = pytest.MonkeyPatch()
    mp.setenv("LDPT_PRIVATE_DIR", str(steward / "private"))
    try:
        privatize(raw, load_policy(bundled_policy()), KEY, extract, nonce="7" * 32,
                  diagnostics_path=steward / "diag.json")
    finally:
        mp.undo()
    return {"base": base, "steward": steward, "partner": partner, "raw": raw, "extract": extract}


class _Tags(html.parser.HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.attrs: list[tuple[str, str, str | None]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.attrs += [(tag, k, v) for k, v in attrs]
        if tag not in VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag: str) -> None:
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1] if self.stack else 'nothing'}")
        else:
            self.stack.pop()

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def parsed(path: Path) -> _Tags:
    doc = path.read_text(encoding="utf-8")
    assert doc.startswith("<!DOCTYPE html>")
    p = _Tags()
    p.feed(doc)
    p.close()
    assert not p.errors and not p.stack, (p.errors, p.stack)
    return p


def self_contained(path: Path, p: _Tags) -> int:
    """No reference outside the file; returns the number of images, each decoded."""
    from PIL import Image

    doc = path.read_text(encoding="utf-8")
    assert not re.search(r"<(script|link|iframe|object|embed)\b", doc, re.I)
    assert "url(" not in doc and "@import" not in doc
    images = 0
    for tag, name, value in p.attrs:
        if name in ("src", "href", "srcset", "action"):
            assert value is not None and value.startswith("data:image/png;base64,"), (tag, name, (value or "")[:40])
            png = base64.b64decode(value.split(",", 1)[1], validate=True)
            with Image.open(io.BytesIO(png)) as im:
                im.verify()
            with Image.open(io.BytesIO(png)) as im:
                assert im.format == "PNG" and im.size[0] > 100 and im.size[1] > 50
            images += 1
    return images


def test_the_partner_report_is_one_self_contained_readable_file(release: dict[str, Path]) -> None:
    out = release["partner"] / "report.html"
    res = release_report(release["extract"], out, crosstabs=[("site", "role")])
    p = parsed(out)
    assert self_contained(out, p) == res.figures and res.figures >= 6  # 4 frequency plots, 2 distributions, 1 map
    text = " ".join(" ".join(p.text).split())
    manifest = load_manifest(default_manifest_path(release["extract"]))
    assert "STEWARD ONLY" not in text and not res.steward
    # the privacy statement: each privatized column's eps and e^eps, the public column unprotected
    for c in manifest.columns:
        assert f"Column {c.name}" in text or c.type == "public"
        if c.type != "public":
            eps = float(c.mechanism["epsilon"])  # type: ignore[index]
            assert f"x {math.exp(eps):.3g}" in text
    assert "survey_wave released in the clear" in text and "NOT protected" in text
    assert "privacy officer" in text and "local law" in text
    # the estimates are those estimate() gives, with their estimands
    est = estimate(release["extract"])
    for name, col in est.columns.items():
        assert col.estimand and " ".join(col.estimand.split()) in text, name
        for f in col.frequencies:
            assert f"{f.estimate:.4g}" in text
        if col.mean is not None:
            assert f"{col.mean.estimate:.4g}" in text
    assert "Cross-tab site by role" in text and res.crosstabs == 1
    assert re.search(r"<tr class=\"(pass|warn|fail)\">", out.read_text()) and "Quality checks" in text
    assert stat.S_IMODE(out.stat().st_mode) == 0o644


def test_the_stewards_report_holds_the_truth_and_stays_with_the_steward(release: dict[str, Path]) -> None:
    out = release["steward"] / "steward-report.html"
    res = release_report(release["extract"], out, raw=release["raw"], key=KEY)
    p = parsed(out)
    assert self_contained(out, p) == res.figures
    text = " ".join(" ".join(p.text).split())
    assert res.steward and text.count("STEWARD ONLY") >= 2 and "the truth against the estimates" in text
    assert stat.S_IMODE(out.stat().st_mode) == 0o600
    for beside in (release["partner"] / "steward.html",):
        with pytest.raises(LdptError, match="steward"):
            release_report(release["extract"], beside, raw=release["raw"], key=KEY)
        assert not beside.exists()
    with pytest.raises(LdptError, match="both"):
        release_report(release["extract"], release["steward"] / "half.html", raw=release["raw"])


def test_the_stewards_report_shows_the_releases_diagnostics(release: dict[str, Path]) -> None:
    """The release's steward-only counts (missing, filled, clipped, unknown values) go in the
    steward's report only; another release's diagnostics file is refused."""
    import json

    diag = json.loads((release["steward"] / "diag.json").read_text())
    out = release["steward"] / "with-diagnostics.html"
    release_report(release["extract"], out, raw=release["raw"], key=KEY, diagnostics=release["steward"] / "diag.json")
    p = parsed(out)
    text = " ".join(" ".join(p.text).split())
    assert "what the release did to the data" in text
    for name, counts in diag["columns"].items():
        assert name in text
        assert f"{counts['missing']:,}" in text
    with pytest.raises(LdptError, match="steward-only"):
        release_report(release["extract"], release["partner"] / "d.html", diagnostics=release["steward"] / "diag.json")
    other = release["steward"] / "other-diag.json"
    other.write_text(json.dumps({**diag, "nonce": "0" * 32}))
    with pytest.raises(LdptError, match="not the diagnostics of this release"):
        release_report(release["extract"], release["steward"] / "o.html", raw=release["raw"], key=KEY,
                       diagnostics=other)
    assert not (release["partner"] / "d.html").exists() and not (release["steward"] / "o.html").exists()


def test_the_report_never_replaces_what_it_reads_or_an_existing_file(release: dict[str, Path]) -> None:
    out = release["partner"] / "again.html"
    release_report(release["extract"], out)
    before = out.read_bytes()
    with pytest.raises(LdptError) as err:
        release_report(release["extract"], out)
    assert err.value.exit_code == 5 and out.read_bytes() == before
    manifest = default_manifest_path(release["extract"])
    data = manifest.read_bytes()
    with pytest.raises(LdptError):
        release_report(release["extract"], manifest, overwrite=True)
    assert manifest.read_bytes() == data
    with pytest.raises(LdptError, match="html"):
        release_report(release["extract"], release["partner"] / "report.txt")


def test_cli_report(release: dict[str, Path], ldpt, tmp_path: Path) -> None:
    out = tmp_path / "r.html"
    r = ldpt("report", str(release["extract"]), "--out", str(out), "--crosstab", "site:role")
    assert r.returncode == 0, r.stderr
    assert "partner's report" in r.stdout and out.exists()
    r = ldpt("report", str(release["extract"]), "--out", str(out))
    assert r.returncode == 5 and "Traceback" not in r.stderr
    r = ldpt("report", str(release["extract"]), "--out", str(tmp_path / "s.html"), "--raw", str(release["raw"]))
    assert r.returncode == 2 and "--key" in r.stderr and not (tmp_path / "s.html").exists()
    r = ldpt("report", str(release["extract"]), "--out", str(tmp_path / "x.html"), "--crosstab", "site:nowhere")
    assert r.returncode == 2 and "Traceback" not in r.stderr and not (tmp_path / "x.html").exists()


def test_the_report_renders_in_a_headless_browser(release: dict[str, Path], tmp_path: Path) -> None:
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("Debian's chromium is not installed here: the headless rendering check needs it")
    out = tmp_path / "report.html"
    release_report(release["extract"], out, crosstabs=[("site", "role")])
    shot = tmp_path / "shot.png"
    subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                    f"--screenshot={shot}", "--window-size=1200,3000", out.as_uri()],
                   check=True, capture_output=True, timeout=120)
    from PIL import Image

    with Image.open(shot) as im:
        assert im.size == (1200, 3000)
        colours = im.convert("RGB").getcolors(maxcolors=1 << 20)
    assert colours is not None and len(colours) > 50  # text and plots drawn, not a blank page
