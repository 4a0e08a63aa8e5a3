"""The demo generator: deterministic, geometrically right, its maps carry the ground truth it records."""

from __future__ import annotations

import json
import tomllib

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from roikit._tables import read_table, sha256_file
from roikit.demo import AFFINE, CONTRASTS, PRIOR_PEAK, REGION_NAMES, SHAPE, TOWNS, make_study
from roikit.demo import generate as gen
from roikit.errors import OutputExistsError, UsageError

N_PER_GROUP = 3  # small studies keep these tests fast; the full study is run in test_demo_cli.py


def _load(path) -> np.ndarray:
    return np.asarray(nib.load(str(path)).dataobj)


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    return make_study(tmp_path_factory.mktemp("demo") / "study", seed=11, n_per_group=N_PER_GROUP)


@pytest.fixture(scope="module")
def plain_means(small):
    """Region means of every written effect map by plain numpy over the atlas and the sphere (no roikit code)."""
    atlas = _load(small.path / "atlas.nii.gz")
    ijk = np.indices(SHAPE).reshape(3, -1).T
    xyz = ijk @ AFFINE[:3, :3].T + AFFINE[:3, 3]
    sphere = (np.sum((xyz - np.array(PRIOR_PEAK["center"])) ** 2, axis=1) <= PRIOR_PEAK["radius"] ** 2).reshape(SHAPE)
    masks = [atlas == k for k in range(1, len(REGION_NAMES) + 1)] + [sphere]
    rows = []
    for pid in small.participants["participant_id"]:
        for contrast in CONTRASTS:
            effect = _load(small.path / "maps" / f"{pid}_contrast-{contrast}_effect.nii.gz").astype(np.float64)
            variance = _load(small.path / "maps" / f"{pid}_contrast-{contrast}_variance.nii.gz").astype(np.float64)
            for name, mask in zip([*REGION_NAMES, PRIOR_PEAK["name"]], masks):
                x, v = effect[mask], variance[mask]
                valid = x != 0
                rows.append({"participant_id": pid, "contrast": contrast, "region": name,
                             "observed": x[valid].mean(), "observed_variance": v[valid].mean(),
                             "n_voxels": int(mask.sum()), "n_valid": int(valid.sum())})
    table = pd.DataFrame(rows)
    return table.merge(small.truth, on=["participant_id", "contrast", "region"], validate="one_to_one")


# --------------------------------------------------------------------------------------------------
# Determinism
# --------------------------------------------------------------------------------------------------


def test_same_seed_gives_identical_files(small, tmp_path):
    again = make_study(tmp_path / "study", seed=11, n_per_group=N_PER_GROUP)
    assert sorted(map(str, again.files)) == sorted(map(str, small.files))
    for rel in small.files:
        assert sha256_file(again.path / rel) == sha256_file(small.path / rel), rel


def test_different_seed_gives_different_data(small, tmp_path):
    other = make_study(tmp_path / "study", seed=12, n_per_group=N_PER_GROUP)
    rel = "maps/sub-01_contrast-novel_effect.nii.gz"
    assert not np.array_equal(_load(small.path / rel), _load(other.path / rel))
    assert not np.array_equal(small.truth["value"].to_numpy(), other.truth["value"].to_numpy())
    # the atlas does not depend on the seed
    assert np.array_equal(_load(small.path / "atlas.nii.gz"), _load(other.path / "atlas.nii.gz"))


def test_generator_argument_is_accepted_and_recorded(tmp_path):
    demo = make_study(tmp_path / "study", seed=np.random.default_rng(3), n_per_group=N_PER_GROUP)
    assert "not reproducible" in demo.ground_truth["seed"]


# --------------------------------------------------------------------------------------------------
# Files, geometry, tables
# --------------------------------------------------------------------------------------------------


def test_grid_and_world_origin(small):
    img = nib.load(str(small.path / "maps" / "sub-01_contrast-novel_effect.nii.gz"))
    assert img.shape == (61, 73, 61)
    assert img.get_data_dtype() == np.float32
    np.testing.assert_allclose(img.affine, AFFINE)
    # voxel (30, 42, 24) is world (0, 0, 0) (issue 3: MNI-like 3 mm grid)
    np.testing.assert_allclose(nib.affines.apply_affine(img.affine, [30, 42, 24]), [0.0, 0.0, 0.0])


def test_atlas_and_label_table(small):
    atlas = _load(small.path / "atlas.nii.gz")
    brain = _load(small.path / "brain_mask.nii.gz").astype(bool)
    labels = read_table(small.path / "atlas.tsv")
    assert list(labels.columns) == ["index", "name", "abbreviation"]
    assert labels["name"].tolist() == list(REGION_NAMES)
    assert sorted(np.unique(atlas[atlas > 0]).tolist()) == labels["index"].tolist()
    assert brain[atlas > 0].all()
    # each region is a contiguous ellipsoid near its stated centre
    for k, region in enumerate(small.ground_truth["regions"][: len(REGION_NAMES)], start=1):
        ijk = np.argwhere(atlas == k)
        centre = nib.affines.apply_affine(AFFINE, ijk).mean(axis=0)
        assert np.all(np.abs(centre - region["center_mm"]) < 3.0), region["name"]
        assert len(ijk) == region["n_voxels"]


def test_maps_are_zero_outside_the_brain(small):
    brain = _load(small.path / "brain_mask.nii.gz").astype(bool)
    for contrast in ("novel", "town3"):
        effect = _load(small.path / "maps" / f"sub-02_contrast-{contrast}_effect.nii.gz")
        variance = _load(small.path / "maps" / f"sub-02_contrast-{contrast}_variance.nii.gz")
        assert np.all(effect[~brain] == 0) and np.all(variance[~brain] == 0)
        assert np.all(effect[brain] != 0) and np.all(variance[brain] > 0)


def test_contrasts_are_consistent_map_by_map(small):
    pid = "sub-02"  # not the dropout participant

    def maps(c):
        return _load(small.path / "maps" / f"{pid}_contrast-{c}_effect.nii.gz").astype(np.float64)

    def var(c):
        return _load(small.path / "maps" / f"{pid}_contrast-{c}_variance.nii.gz").astype(np.float64)

    # novel-vs-familiar = novel - familiar; novel = mean of the six towns (float32 rounding only)
    np.testing.assert_allclose(maps("novel-vs-familiar"), maps("novel") - maps("familiar"), atol=1e-5)
    np.testing.assert_allclose(maps("novel"), np.mean([maps(t) for t in TOWNS], axis=0), atol=1e-5)
    np.testing.assert_allclose(var("novel-vs-familiar"), 2 * var("familiar"), rtol=1e-6)
    np.testing.assert_allclose(var("town4"), 6 * var("novel"), rtol=1e-6)
    truth = small.truth.set_index(["participant_id", "contrast", "region"])["value"]
    for region in REGION_NAMES:
        nvf = truth[pid, "novel-vs-familiar", region]
        assert nvf == pytest.approx(truth[pid, "novel", region] - truth[pid, "familiar", region], abs=1e-12)
        towns = [truth[pid, t, region] for t in TOWNS]
        assert np.mean(towns) == pytest.approx(truth[pid, "novel", region], abs=1e-12)


def test_participants_table(small):
    table = read_table(small.path / "participants.tsv")
    assert list(table.columns) == ["participant_id", "group", "age", "sex", "handedness", "route_accuracy", "mean_fd"]
    assert table["participant_id"].tolist() == [f"sub-{i:02d}" for i in range(1, 2 * N_PER_GROUP + 1)]
    assert (table["group"] == "younger").sum() == N_PER_GROUP == (table["group"] == "older").sum()
    younger, older = table[table["group"] == "younger"], table[table["group"] == "older"]
    assert younger["age"].between(20, 35).all() and older["age"].between(60, 78).all()
    assert set(table["sex"]) <= {"F", "M"} and set(table["handedness"]) <= {"R", "L"}
    assert table["route_accuracy"].between(0, 100).all() and (table["mean_fd"] > 0).all()
    sidecar = json.loads((small.path / "participants.json").read_text())
    assert set(sidecar) == set(table.columns) | {"GeneratedBy"}


def test_study_file_follows_the_contract(small):
    text = (small.path / "study.toml").read_text()
    study = tomllib.loads(text)
    assert study["study"]["participants"] == "participants.tsv"
    assert (small.path / study["study"]["participants"]).is_file()
    assert (small.path / study["regions"]["atlas"]).is_file() and (small.path / study["regions"]["labels"]).is_file()
    sphere = study["regions"]["sphere"][0]
    assert sphere == {"name": "prior peak", "center": [30.0, -20.0, -14.0], "radius": 6.0}
    for key in ("effect", "variance"):
        example = study["maps"][key].format(subject="01", contrast="novel-vs-familiar")
        assert (small.path / example).is_file(), example
    designs = [a["design"] for a in study["analysis"]]
    # the contract's designs (CONTRACT.md, "Designs and their options")
    assert set(designs) <= {"one-sample", "paired", "two-group", "glm", "precision-weighted", "mixed",
                            "fixed-effects", "repeated-measures", "region-difference"}
    assert {"paired", "two-group", "glm", "precision-weighted", "mixed", "repeated-measures",
            "region-difference"} <= set(designs)
    # the within factors come from the study's contrasts and regions tables
    contrasts_table = read_table(small.path / study["study"]["contrasts"])
    regions_table = read_table(small.path / study["study"]["regions"])
    assert (small.path / "contrasts.json").is_file() and (small.path / "regions.json").is_file()
    assert dict(zip(contrasts_table["contrast"], contrasts_table["route"].fillna("n/a"))) == {
        "novel": "novel", "familiar": "familiar", "novel-vs-familiar": "n/a",
        **{f"town{k}": "n/a" for k in range(1, 7)}}
    assert list(contrasts_table["town"].dropna()) == [f"town{k}" for k in range(1, 7)]
    paired = regions_table.dropna(subset=["hemisphere"])
    assert sorted(paired.groupby("structure")["hemisphere"].apply(sorted).map(tuple).unique()) == [("left", "right")]
    assert set(paired["structure"]) == {"hippocampus", "parahippocampal gyrus", "caudate"}
    repeated = next(a for a in study["analysis"] if a["design"] == "repeated-measures")
    assert repeated["within"] == ["route", "hemisphere"] and repeated["between"] == "group"
    participants = read_table(small.path / "participants.tsv")
    for analysis in study["analysis"]:
        for level in analysis.get("levels", []):
            assert level in set(participants[analysis["group"]])
        contrasts = analysis.get("contrast", [])
        for c in [contrasts] if isinstance(contrasts, str) else contrasts:
            assert c in CONTRASTS
        if "formula" in analysis:
            rhs = analysis["formula"].split("~")[1]
            for term in rhs.replace("*", "+").split("+"):
                assert term.strip() in set(participants.columns) | {"contrast", "1"}, term


def test_everything_says_invented(small):
    assert "invented" in small.ground_truth["note"]
    assert "invented" in (small.path / "README.md").read_text()
    assert "invented" in (small.path / "study.toml").read_text()
    assert b"invented" in nib.load(str(small.path / "atlas.nii.gz")).header["descrip"].tobytes()


# --------------------------------------------------------------------------------------------------
# Region means recover the ground truth within their sampling error
# --------------------------------------------------------------------------------------------------


def test_region_means_recover_truth_within_sampling_error(plain_means):
    full = plain_means[plain_means["n_valid"] == plain_means["n_voxels"]]
    assert len(full) >= len(plain_means) - 2 * len(CONTRASTS)  # only the dropout participant's regions differ
    z = (full["observed"] - full["value"]) / full["noise_sd"]
    # Bound: every region mean within 5 SD of its truth, the SD being that of the region mean of the smooth
    # noise, sqrt(m_c * v_i * c_r) with c_r from the kernel autocorrelation (see generate._noise_factor).
    # P(|z| > 5) = 5.7e-7 per value for a normal variable (two-sided normal tail; common practice).
    assert np.abs(z).max() < 5.0
    # Calibration: the standardised errors have SD 1 when the smoothness is accounted for. With about 500
    # values the sample SD has a standard error of about 0.03; 0.8..1.2 is over 5 of those.
    assert 0.8 < z.std() < 1.2
    assert abs(z.mean()) < 0.25


def test_ignoring_smoothness_would_understate_the_error(plain_means):
    """Var(region mean) is far above mean voxel variance / n_voxels for smooth noise (why the bound uses c_r)."""
    full = plain_means[plain_means["n_valid"] == plain_means["n_voxels"]]
    naive_sd = np.sqrt(full["variance"] / full["n_voxels"])
    z_naive = (full["observed"] - full["value"]) / naive_sd
    assert z_naive.std() > 2.5
    # and the contract's region variance (mean voxel variance) is an upper bound on the region-mean variance
    assert (full["noise_sd"] ** 2 <= full["variance"]).all()


def test_variance_maps_carry_the_recorded_variance(plain_means):
    full = plain_means[plain_means["n_valid"] == plain_means["n_voxels"]]
    np.testing.assert_allclose(full["observed_variance"], full["variance"], rtol=1e-5)


def test_extraction_agrees_with_plain_numpy(small, plain_means):
    from roikit.demo import demo_maps, demo_regions
    from roikit.extraction import extract

    values = extract(demo_maps(small.path), demo_regions(small.path), progress=False)
    merged = values.merge(plain_means, on=["participant_id", "contrast", "region"], suffixes=("", "_numpy"),
                          validate="one_to_one")
    assert len(merged) == len(plain_means)
    np.testing.assert_array_equal(merged["n_voxels"], merged["n_voxels_numpy"])
    np.testing.assert_array_equal(merged["n_valid"], merged["n_valid_numpy"])
    np.testing.assert_allclose(merged["value"], merged["observed"], rtol=1e-6, atol=1e-7)
    np.testing.assert_allclose(merged["variance"], merged["observed_variance"], rtol=1e-6)


# --------------------------------------------------------------------------------------------------
# Ground truth: the built-in truths and the planted problems
# --------------------------------------------------------------------------------------------------


def test_built_in_truths(small):
    pop = small.ground_truth["population_effects"]
    nvf = pop["novel-vs-familiar"]
    for hc in ("left hippocampus", "right hippocampus"):
        assert nvf["younger"][hc] > nvf["older"][hc] > 0  # novel > familiar, weaker in older adults
    for cau in ("left caudate", "right caudate"):
        assert nvf["younger"][cau] < 0 and nvf["older"][cau] < 0  # familiar > novel
    assert nvf["younger"]["primary visual cortex"] == 0 == nvf["older"]["primary visual cortex"]
    slopes = small.ground_truth["route_accuracy_model"]["within_group_slope_of_novel_vs_familiar_on_route_accuracy"]
    assert slopes["left hippocampus"] > 0 and slopes["right hippocampus"] > 0
    assert slopes["primary visual cortex"] == 0  # the control region is unrelated to behaviour
    town = small.ground_truth["town_effects"]
    for region in REGION_NAMES:
        effects = [town[t][region] for t in TOWNS]
        assert sum(effects) == pytest.approx(0, abs=1e-12) and np.ptp(effects) > 0


def test_planted_problems_are_where_the_ground_truth_says(small, plain_means):
    problems = {p["kind"]: p for p in small.ground_truth["planted_problems"]}
    assert set(problems) == {"dropout", "outlier", "large_variance"}
    assert len({p["participant_id"] for p in problems.values()}) == 3

    # dropout: zeros exactly in the recorded regions, for every contrast of that participant, nobody else
    drop = problems["dropout"]
    assert drop["regions"] and drop["regions"]["left hippocampus"]["fraction_valid"] < 0.5
    short = plain_means[plain_means["n_valid"] < plain_means["n_voxels"]]
    assert set(short["participant_id"]) == {drop["participant_id"]}
    assert set(short["region"]) == set(drop["regions"])
    assert set(short["contrast"]) == set(CONTRASTS)
    for _, row in short.iterrows():
        recorded = drop["regions"][row["region"]]
        assert row["n_voxels"] - row["n_valid"] == recorded["n_zeroed"]

    # outlier: the true novel response is shifted by the recorded offset (6 between-participant SDs)
    out = problems["outlier"]
    truth = small.truth.set_index(["participant_id", "contrast", "region"])["value"]
    pop = small.ground_truth["population_effects"]["novel"]["older"]
    sd = small.ground_truth["between_participant_sd"]["novel"]
    for region, offset in out["offset"].items():
        assert offset == pytest.approx(6 * sd[region])
        assert truth[out["participant_id"], "novel", region] - pop[region] > 3 * sd[region]

    # large first-level variance: ten times the reference variance, in the variance maps too
    big = problems["large_variance"]
    per = small.ground_truth["participants"]
    assert per[big["participant_id"]]["reference_variance"] == pytest.approx(10 * big["typical_reference_variance"])
    fam = plain_means[(plain_means["contrast"] == "familiar") & (plain_means["region"] == "primary visual cortex")]
    ratio = fam.set_index("participant_id")["observed_variance"]
    others = ratio.drop(big["participant_id"])
    assert ratio[big["participant_id"]] > 4 * others.median()


def test_no_problems_when_asked(tmp_path):
    demo = make_study(tmp_path / "study", seed=11, n_per_group=N_PER_GROUP, problems=False)
    assert demo.ground_truth["planted_problems"] == []
    brain = _load(demo.path / "brain_mask.nii.gz").astype(bool)
    for pid in demo.participants["participant_id"]:
        assert np.all(_load(demo.path / "maps" / f"{pid}_contrast-familiar_effect.nii.gz")[brain] != 0)


def test_route_accuracy_model_matches_its_recorded_slope():
    """Simulation check of the algebra behind the recorded within-group slopes (seeded, many participants)."""
    rng = np.random.default_rng(5)
    model = gen._draw_model(rng, 2000, problems=False)
    older = model["group"] == "older"
    nvf = model["novel"] - model["familiar"]
    hc = [REGION_NAMES.index("left hippocampus"), REGION_NAMES.index("right hippocampus")]
    acc = model["route_accuracy"]
    for r in range(len(REGION_NAMES)):
        for grp in (~older, older):
            x, y = acc[grp], nvf[grp, r]
            slope = np.cov(x, y)[0, 1] / np.var(x, ddof=1)
            resid_sd = np.std(y - slope * x, ddof=2)
            se = resid_sd / (np.std(x, ddof=1) * np.sqrt(len(x)))
            # within 5 standard errors of the ordinary least-squares slope (common practice, no source)
            assert abs(slope - model["route_accuracy_slope"][r]) < 5 * se + 1e-4, REGION_NAMES[r]
    # the hippocampal effect and accuracy correlate within each group: 5 / sqrt(5^2 + 4^2) = 0.78 for h
    h = nvf[:, hc].mean(axis=1)
    r_within = np.corrcoef(acc[~older], h[~older])[0, 1]
    assert 0.7 < r_within < 0.85


# --------------------------------------------------------------------------------------------------
# Options and refusals
# --------------------------------------------------------------------------------------------------


def test_existing_folder_is_not_replaced_without_consent(small):
    with pytest.raises(OutputExistsError, match="folder exists; pass overwrite=True"):
        make_study(small.path, seed=11, n_per_group=N_PER_GROUP)


def test_foreign_folder_is_never_replaced(tmp_path):
    (tmp_path / "study").mkdir()
    (tmp_path / "study" / "notes.txt").write_text("mine")
    with pytest.raises(OutputExistsError, match="not a roikit demo study"):
        make_study(tmp_path / "study", n_per_group=N_PER_GROUP, overwrite=True)
    assert (tmp_path / "study" / "notes.txt").read_text() == "mine"


def test_overwrite_replaces_an_earlier_demo(tmp_path):
    make_study(tmp_path / "study", seed=1, n_per_group=4)
    demo = make_study(tmp_path / "study", seed=2, n_per_group=N_PER_GROUP, overwrite=True)
    assert demo.ground_truth["seed"] == 2
    assert not (tmp_path / "study" / "maps" / "sub-08_contrast-novel_effect.nii.gz").exists()
    assert [p.name for p in tmp_path.iterdir()] == ["study"]  # no temporary folders left behind


@pytest.mark.parametrize("bad", [2, 100, 3.0, True])
def test_bad_n_per_group(tmp_path, bad):
    with pytest.raises(UsageError, match="n_per_group must be an integer from 3 to 99"):
        make_study(tmp_path / "study", n_per_group=bad)


@pytest.mark.parametrize("bad", ["7", 1.5, True, -3])
def test_bad_seed(tmp_path, bad):
    with pytest.raises(UsageError, match="seed must be an int"):
        make_study(tmp_path / "study", seed=bad, n_per_group=N_PER_GROUP)
