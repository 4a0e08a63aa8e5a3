"""The template notebooks run top to bottom in a fresh kernel against the demo study, show their figures inline,
use only roikit's public API, and save their outputs."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import nbformat
import numpy as np
import pandas as pd
import pytest
from nbclient import NotebookClient

from roikit._tables import read_table

ROOT = Path(__file__).resolve().parents[2]
FOLDER = ROOT / "notebooks"
NAMES = sorted(p.name for p in FOLDER.glob("*.ipynb"))

#: Files each notebook must leave in the results folder (relative paths).
EXPECTED = {
    "01_from_maps_to_a_region_table.ipynb": ["region_values.tsv", "region_values.json",
                                              "tables/coverage_by_participant.tsv", "tables/regions.tsv",
                                              "figures/first_look_novel-vs-familiar.png", "figures/coverage_by_participant.png",
                                              "figures/regions.png"],
    "02_is_there_an_effect.ipynb": ["tables/a1-one-sample.md",
                                    "tables/a1-one-sample.docx",
                                    "tables/a2-paired.tsv",
                                    "figures/one_sample_novel-vs-familiar_participants.png",
                                    "figures/one_sample_novel-vs-familiar_forest.png",
                                    "figures/paired_novel_vs_familiar_participants.png"],
    "03_two_groups_and_covariates.ipynb": ["tables/descriptives.md",
                                           "figures/two_group_novel-vs-familiar_participants.png",
                                           "figures/glm_novel-vs-familiar_route_accuracy.png"],
    "04_repeated_measures_and_stimuli.ipynb": ["figures/precision_weighted_novel-vs-familiar.png",
                                               "figures/mixed_stimuli.png",
                                               "figures/repeated_measures_interaction.png",
                                               "tables/a6-repeated-measures.tsv"],
    "05_why_participants_are_random_effects.ipynb": ["tables/simulation_false_positives.tsv",
                                                     "tables/simulation_power.tsv",
                                                     "figures/simulation_false_positives.png",
                                                     "figures/simulation_power.png"],
    "06_circular_analysis_and_functional_regions.ipynb": ["tables/simulation_circular.tsv",
                                                          "figures/simulation_circular.png"],
}


def _run(nb, cwd: Path):
    client = NotebookClient(nb, timeout=600, kernel_name="python3", resources={"metadata": {"path": str(cwd)}})
    client.execute()
    return nb


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo study written once (the notebooks' default study), and one results folder they share."""
    from roikit.demo import make_study

    root = tmp_path_factory.mktemp("notebooks")
    make_study(root / "study")
    return {"study": root / "study", "out": root / "results", "cwd": root}


def test_the_notebooks_are_there_and_stripped():
    assert NAMES == sorted(EXPECTED)
    for name in NAMES:
        nb = nbformat.read(FOLDER / name, as_version=4)
        assert nb.metadata["kernelspec"]["name"] == "python3"
        assert nb.cells[1].metadata.get("tags") == ["parameters"], name
        assert "STUDY = None" in nb.cells[1].source
        for cell in nb.cells:
            if cell.cell_type == "code":
                assert cell.outputs == [] and cell.execution_count is None, name


def test_notebooks_are_built_from_the_script(tmp_path):
    spec = importlib.util.spec_from_file_location("_build", FOLDER / "_build.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    for path in module.build(tmp_path):
        assert path.read_bytes() == (FOLDER / path.name).read_bytes(), f"rebuild {path.name}: python notebooks/_build.py"


def test_the_kernel_runs_this_interpreter(tmp_path):
    nb = nbformat.v4.new_notebook(cells=[nbformat.v4.new_code_cell("import sys\nprint(sys.executable)")])
    _run(nb, tmp_path)
    assert Path(nb.cells[0].outputs[0]["text"].strip()).resolve() == Path(sys.executable).resolve()


@pytest.mark.slow
@pytest.mark.parametrize("name", NAMES)
def test_notebook_runs_top_to_bottom(name, demo):
    nb = nbformat.read(FOLDER / name, as_version=4)
    params = nb.cells[1]
    # like a papermill injection: the defaults stay, the overrides follow them
    params.source += (f"\nDEMO_FOLDER = {str(demo['study'])!r}\nOUT = {str(demo['out'])!r}\n"
                      "FIGURE_FORMATS = ('png',)\n")
    _run(nb, demo["cwd"])
    errors = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs if o.output_type == "error"]
    assert not errors
    for rel in EXPECTED[name]:
        assert (demo["out"] / rel).is_file(), rel
    # every cell that draws shows its figures inline (roikit builds figures without pyplot: plt.show() shows none)
    drawing = [c for c in nb.cells if "figure" in c.metadata.get("tags", [])]
    assert drawing, "no cell is tagged as drawing a figure"
    for cell in drawing:
        images = [o for o in cell.outputs if o.output_type in ("display_data", "execute_result")
                  and "image/png" in o.get("data", {})]
        assert len(images) == cell.metadata["roikit"]["figures"], cell.source[:200]
    # no figure shown as a mere "<Figure size ...>" text, no progress-bar text or widget warnings in the outputs
    # (a progress bar is a widget: in Jupyter it draws as one; its plain-text stand-in is one line, kept by nbclient)
    widget = "application/vnd.jupyter.widget-view+json"
    for cell in nb.cells:
        for o in cell.outputs if cell.cell_type == "code" else []:
            data = o.get("data", {})
            shown = "" if "image/png" in data or widget in data else o.get("text", "") + str(data.get("text/plain", ""))
            assert "<Figure size" not in shown, cell.source[:200]
            assert "TqdmWarning" not in shown and "IProgress" not in shown, shown[:300]
            assert "it/s]" not in shown and "map/s]" not in shown, shown[:300]


def test_notebooks_use_only_the_public_api():
    """No private module or name (``roikit._tables``, ``from roikit.x import _helper``), no pyplot, no helper
    functions repeated in every notebook."""
    import re

    for name in NAMES:
        nb = nbformat.read(FOLDER / name, as_version=4)
        source = "\n".join(c.source for c in nb.cells if c.cell_type == "code")
        assert not re.search(r"roikit(\.\w+)*\._", source), name
        assert not re.search(r"from roikit[\w.]* import [^\n]*\b_\w", source), name
        assert "pyplot" not in source and "plt." not in source, name
        assert not re.search(r"^def ", nb.cells[2].source, re.M), f"{name}: helper functions in the setup cell"


@pytest.mark.slow
def test_the_simulation_shows_what_it_claims(demo):
    """Notebook 05's saved tables (seeded): fixed effects inflate false positives, random effects do not."""
    path = demo["out"] / "tables" / "simulation_false_positives.tsv"
    if not path.is_file():
        pytest.skip("notebook 05 did not run in this session")
    fp = read_table(path)
    widest = fp.iloc[-1]
    # 500 studies per point: a rate of .05 has a binomial SE of about .01 (common practice, no source)
    assert widest["fixed effects"] > 0.10
    assert 0.02 < widest["random effects (one-sample t)"] < 0.08
    assert (fp["precision-weighted"].between(0.02, 0.09)).all()
    power = read_table(demo["out"] / "tables" / "simulation_power.tsv")
    assert power["precision-weighted"].iloc[-1] > power["one-sample t (unweighted)"].iloc[-1] + 0.05
    assert isinstance(power, pd.DataFrame)


@pytest.mark.slow
def test_the_circular_simulation_shows_what_it_claims(demo):
    """Notebook 06's saved table (seeded): on pure noise the circular functional region finds an 'effect' in every
    search space; the cross-validated one (split by run) is unbiased and rejects at the nominal rate."""
    path = demo["out"] / "tables" / "simulation_circular.tsv"
    if not path.is_file():
        pytest.skip("notebook 06 did not run in this session")
    table = read_table(path).set_index("definition")
    circular, held_out = table.loc["circular"], table.loc["cross-validated (split by run)"]
    # the circular value: the mean of the top 5 of 50 N(0, 1/2) values, about 1.7 / sqrt(2) = 1.2 (expected mean
    # of the top 10% of a standard normal, 1.755, from the truncated-normal mean phi(1.2816) / 0.1; common practice)
    assert 1.0 < circular["mean_estimate"] < 1.4 and circular["rejection_rate"] == 1.0
    # unbiased: the mean over 200 search spaces within 3 standard errors of 0
    assert abs(held_out["mean_estimate"]) < 3 * held_out["sd_estimate"] / np.sqrt(held_out["search_spaces"])
    # nominal rate within 3 Monte Carlo SE: sqrt(.05 x .95 / 200) = 0.0154 (binomial SE; common practice)
    assert abs(held_out["rejection_rate"] - 0.05) < 3 * np.sqrt(0.05 * 0.95 / held_out["search_spaces"])
