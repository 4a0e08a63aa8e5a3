"""The project is citable: CITATION.cff and LICENSE agree with pyproject.toml; references as published."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

from roikit import __version__
from roikit.reporting.references import REFERENCES, Citations, bibtex, reference_list

ROOT = Path(__file__).resolve().parents[2]


def test_citation_and_license_files():
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    cff = (ROOT / "CITATION.cff").read_text()
    assert re.search(r"^cff-version: 1\.2\.0$", cff, re.M)
    assert f'version: "{project["version"]}"' in cff and "license: BSD-3-Clause" in cff
    assert project["license"] == "BSD-3-Clause"
    licence = (ROOT / "LICENSE").read_text()
    assert licence.startswith("BSD 3-Clause License") and "roikit developers" in licence
    assert "Neither the name of the copyright holder" in licence  # clause 3 of the BSD-3-Clause text (SPDX)


def test_only_cited_works_are_listed():
    cite = Citations()
    assert cite.cite("holm1979") == "Holm, 1979"
    assert cite.year("benjamini1995") == "Benjamini & Hochberg (1995)"
    entries = reference_list(cite.keys)
    assert len(entries) == 2 and entries[0].startswith("Benjamini, Y., & Hochberg, Y. (1995).")
    bib = bibtex(cite.keys)
    assert bib.count("@") == 2 and "doi = {10.1111/j.2517-6161.1995.tb02031.x}" in bib
    # the software reference carries this version
    assert f"(Version {__version__})" in REFERENCES["roikit"].entry


def test_reference_details_as_published():
    # from memory of the publications (journal, volume, pages); no library lookup
    assert "*Scandinavian Journal of Statistics, 6*(2), 65–70" in REFERENCES["holm1979"].entry
    assert "*Biometrics Bulletin, 2*(6), 110–114" in REFERENCES["satterthwaite1946"].entry
    assert "*Statistics in Medicine, 22*(17), 2693–2710" in REFERENCES["knapp2003"].entry
    assert "Westfall, P. H., & Young, S. S. (1993)" in REFERENCES["westfall1993"].entry
    assert "*Journal of Educational Statistics, 6*(2), 107–128" in REFERENCES["hedges1981"].entry
