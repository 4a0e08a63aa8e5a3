"""The study-file reference page is generated from the one table of options and kept current."""

from pathlib import Path

from roikit._options import OPTIONS
from roikit.study.reference import study_file_reference
from roikit.study.schema import STUDY_KEYS

ROOT = Path(__file__).resolve().parents[2]


def test_reference_page_is_current():
    page = (ROOT / "docs" / "study-file.md").read_text(encoding="utf-8")
    assert page == study_file_reference(), (
        "docs/study-file.md is out of date; run: python -m roikit.study.reference docs/study-file.md")


def test_every_study_key_is_documented_and_readme_links_the_page():
    page = study_file_reference()
    for section, keys in STUDY_KEYS.items():
        for key in keys:
            if section:
                assert f"| `{key}` |" in page, (section, key)
    assert "docs/study-file.md" in (ROOT / "README.md").read_text(encoding="utf-8")


def test_study_keys_come_from_the_table():
    analysis = {o.study_key for o in OPTIONS if o.section == "analysis"}
    assert set(STUDY_KEYS["analysis"]) == analysis
    assert "jobs" in STUDY_KEYS["analysis"] and "midline" in STUDY_KEYS["regions"]
