"""Fixtures for the reporting tests: an invented wayfinding study (32 adults, younger/older).

Region values are simulated with a fixed seed; result rows for each design are computed here with scipy
(one-sample, paired, two-group) or written as plausible rows with every optional column the stats layer
fills (glm with an F row, precision-weighted, mixed, fixed-effects), so the reporting layer is tested without
depending on the statistics code.
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pandas as pd
import pytest
from scipy import stats

REGIONS = ["left hippocampus", "right hippocampus", "retrosplenial cortex"]
GROUPS = ["younger", "older"]


def _participants() -> pd.DataFrame:
    rng = np.random.default_rng(11)
    ids = [f"sub-{i:02d}" for i in range(1, 33)]
    group = ["younger"] * 16 + ["older"] * 16
    age = np.r_[rng.uniform(19, 35, 16), rng.uniform(62, 80, 16)].round(1)
    return pd.DataFrame({"participant_id": ids, "group": group, "age": age})


def _values(participants: pd.DataFrame) -> pd.DataFrame:
    rng = np.random.default_rng(2024)
    rows = []
    n_vox = {"left hippocampus": 412, "right hippocampus": 398, "retrosplenial cortex": 655}
    effect = {"left hippocampus": 0.45, "right hippocampus": 0.30, "retrosplenial cortex": 0.05}
    for _, p in participants.iterrows():
        older = p["group"] == "older"
        for region in REGIONS:
            base = rng.normal(0.2, 0.4)
            for contrast, shift in (("novel", effect[region] - (0.2 if older else 0.0)), ("familiar", 0.0)):
                value = base + shift + rng.normal(0, 0.25)
                n_valid = n_vox[region] - int(rng.integers(0, 20))
                variance = float(rng.uniform(0.02, 0.2))
                rows.append((p["participant_id"], contrast, region, value, n_vox[region], n_valid, variance))
            for k in range(1, 4):
                rows.append((p["participant_id"], f"town{k}", region, base + 0.1 * k + rng.normal(0, 0.3),
                             n_vox[region], n_vox[region], float(rng.uniform(0.02, 0.2))))
    values = pd.DataFrame(rows, columns=["participant_id", "contrast", "region", "value", "n_voxels", "n_valid",
                                         "variance"])
    # one low-coverage participant and one missing value (no valid voxel)
    low = (values.participant_id == "sub-05") & (values.region == "right hippocampus") & (values.contrast == "novel")
    values.loc[low, "n_valid"] = 150
    miss = (values.participant_id == "sub-30") & (values.region == "retrosplenial cortex") & (
        values.contrast == "novel")
    values.loc[miss, "value"] = np.nan
    values.loc[miss, "n_valid"] = 0
    # one clear outlier
    out = (values.participant_id == "sub-12") & (values.region == "left hippocampus") & (values.contrast == "novel")
    values.loc[out, "value"] = 2.9
    # provenance shaped like roikit.extraction.extract's values.attrs["roikit"]
    values.attrs["roikit"] = {
        "kind": "region values",
        "statistic": "mean",
        "keep_zeros": False,
        "regions": [
            {"region": "left hippocampus", "n_voxels": 412, "source": {
                "kind": "atlas", "image": "wayfinding_atlas.nii.gz", "labels": "wayfinding_atlas.tsv", "index": 1}},
            {"region": "right hippocampus", "n_voxels": 398, "source": {
                "kind": "atlas", "image": "wayfinding_atlas.nii.gz", "labels": "wayfinding_atlas.tsv", "index": 2}},
            {"region": "retrosplenial cortex", "n_voxels": 655, "circular": True, "source": {
                "kind": "sphere", "center_mm": [8.0, -52.0, 12.0], "radius_mm": 6.0}},
        ],
        "resampling": [{"image": "wayfinding_atlas.nii.gz", "what": "atlas", "method": "nearest neighbour"}],
    }
    return values


def _common(region, design, term, **kw):
    row = {"region": region, "design": design, "term": term, "contrast": "novel", "versus": np.nan,
           "group_column": np.nan, "levels": np.nan, "formula": np.nan, "confidence": 0.95, "permutations": 0,
           "seed": np.nan, "population_inference": True, "correction": "holm,fdr", "family_size": len(REGIONS),
           "excluded_ids": "", "n_outliers": 0, "outlier_ids": "", "n_low_coverage": 0, "low_coverage_ids": "",
           "shapiro_w": np.nan, "shapiro_p": np.nan}
    row.update(kw)
    return row


def _holm(p):
    p = np.asarray(p, float)
    order = np.argsort(p)
    m = p.size
    adj = np.maximum.accumulate((m - np.arange(m)) * p[order])
    out = np.empty(m)
    out[order] = np.minimum(adj, 1)
    return out


def _fdr(p):
    p = np.asarray(p, float)
    order = np.argsort(p)[::-1]
    m = p.size
    adj = np.minimum.accumulate(p[order] * m / np.arange(m, 0, -1))
    out = np.empty(m)
    out[order] = np.minimum(adj, 1)
    return out


def _correct(rows):
    frame = pd.DataFrame(rows)
    frame["p_holm"] = np.nan
    frame["p_fdr"] = np.nan
    for _, idx in frame.groupby(["design", "term"], sort=False).groups.items():
        frame.loc[idx, "p_holm"] = _holm(frame.loc[idx, "p"])
        frame.loc[idx, "p_fdr"] = _fdr(frame.loc[idx, "p"])
    return frame


def _ids_flags(values, region, contrast):
    part = values[(values.region == region) & (values.contrast == contrast)]
    low = part[part.n_valid / part.n_voxels < 0.5]
    low = low[low.value.notna()]
    x = part.value.dropna()
    med = x.median()
    mad = (x - med).abs().median()
    z = 0.6745 * (x - med) / mad
    outliers = part.loc[z[abs(z) > 3.5].index, "participant_id"]
    missing = part[part.value.isna()].participant_id
    return {"n_outliers": len(outliers), "outlier_ids": ",".join(outliers),
            "n_low_coverage": len(low), "low_coverage_ids": ",".join(low.participant_id),
            "excluded_ids": ",".join(missing)}


def _one_sample(values, design="one-sample"):
    rows = []
    for region in REGIONS:
        x = values[(values.region == region) & (values.contrast == "novel")].value.dropna().to_numpy()
        n = x.size
        res = stats.ttest_1samp(x, 0.0)
        ci = res.confidence_interval(0.95)
        d = x.mean() / x.std(ddof=1)
        extra = dict(population_inference=design == "one-sample", df_method="student")
        rows.append(_common(region, design, "mean", n=n, estimate=x.mean(), se=x.std(ddof=1) / np.sqrt(n),
                            df=n - 1, statistic=res.statistic, statistic_type="t", p=res.pvalue, ci_low=ci.low,
                            ci_high=ci.high, effect_size=d, effect_size_type="d", effect_size_ci_low=d - 0.37,
                            effect_size_ci_high=d + 0.36, **_ids_flags(values, region, "novel"), **extra))
    return _correct(rows)


def _paired(values):
    rows = []
    for region in REGIONS:
        part = values[values.region == region].pivot(index="participant_id", columns="contrast", values="value")
        diff = (part["novel"] - part["familiar"]).dropna().to_numpy()
        n = diff.size
        res = stats.ttest_1samp(diff, 0.0)
        ci = res.confidence_interval(0.95)
        dz = diff.mean() / diff.std(ddof=1)
        rows.append(_common(region, "paired", "novel - familiar", versus="familiar", n=n, estimate=diff.mean(),
                            se=diff.std(ddof=1) / np.sqrt(n), df=n - 1, statistic=res.statistic,
                            statistic_type="t", p=res.pvalue, ci_low=ci.low, ci_high=ci.high, effect_size=dz,
                            effect_size_type="d_z", effect_size_ci_low=dz - 0.37, effect_size_ci_high=dz + 0.37,
                            df_method="student", **_ids_flags(values, region, "novel")))
    return _correct(rows)


def _two_group(values, participants):
    rows = []
    merged = values.merge(participants, on="participant_id")
    for region in REGIONS:
        part = merged[(merged.region == region) & (merged.contrast == "novel")]
        a = part[part.group == "younger"].value.dropna().to_numpy()
        b = part[part.group == "older"].value.dropna().to_numpy()
        res = stats.ttest_ind(a, b, equal_var=False)
        ci = res.confidence_interval(0.95)
        sp = np.sqrt(((a.size - 1) * a.var(ddof=1) + (b.size - 1) * b.var(ddof=1)) / (a.size + b.size - 2))
        g = (a.mean() - b.mean()) / sp * 0.975
        rows.append(_common(region, "two-group", "younger - older", group_column="group", levels="younger,older",
                            n=a.size + b.size, estimate=a.mean() - b.mean(),
                            se=(a.mean() - b.mean()) / res.statistic, df=res.df, statistic=res.statistic,
                            statistic_type="t", p=res.pvalue, ci_low=ci.low, ci_high=ci.high, effect_size=g,
                            effect_size_type="g", effect_size_ci_low=g - 0.7, effect_size_ci_high=g + 0.7,
                            df_method="welch", brown_forsythe_p=0.41, **_ids_flags(values, region, "novel")))
    return _correct(rows)


def _glm(values):
    rows = []
    for i, region in enumerate(REGIONS):
        for term, est, se, df1 in (("Intercept", 0.42 - 0.1 * i, 0.08, None), ("age", -0.0061 - 0.001 * i, 0.0021, None),
                                   ("group", np.nan, np.nan, 1)):
            if df1 is None:
                t = est / se
                p = 2 * stats.t.sf(abs(t), 29)
                rows.append(_common(region, "glm", term, formula="value ~ age + group", n=32, estimate=est, se=se,
                                    df=29.0, statistic=t, statistic_type="t", p=p, ci_low=est - 2.045 * se,
                                    ci_high=est + 2.045 * se, effect_size=np.nan, effect_size_type=np.nan,
                                    effect_size_ci_low=np.nan, effect_size_ci_high=np.nan, df_method="residual",
                                    df1=np.nan, centered="age", max_leverage=0.21, max_cooks_d=0.3))
            else:
                f = 4.56 - i
                p = stats.f.sf(f, 1, 29)
                rows.append(_common(region, "glm", term, formula="value ~ age + group", n=32, estimate=np.nan,
                                    se=np.nan, df=29.0, df1=1.0, statistic=f, statistic_type="F", p=p,
                                    ci_low=np.nan, ci_high=np.nan, effect_size=f / (f + 29),
                                    effect_size_type="partial_eta2", effect_size_ci_low=np.nan,
                                    effect_size_ci_high=np.nan, df_method="residual", centered="age"))
    return _correct(rows)


def _precision(values):
    rows = []
    for i, region in enumerate(REGIONS):
        est, se = 0.39 - 0.15 * i, 0.07
        t = est / se
        rows.append(_common(region, "precision-weighted", "mean", n=32 - (i == 2), estimate=est, se=se, df=30.0,
                            statistic=t, statistic_type="t", p=2 * stats.t.sf(abs(t), 30), ci_low=est - 2.04 * se,
                            ci_high=est + 2.04 * se, effect_size=np.nan, effect_size_type=np.nan,
                            effect_size_ci_low=np.nan, effect_size_ci_high=np.nan, df_method="knapp-hartung",
                            tau2=[0.061, 0.0, 0.043][i], i2=[48.2, 0.0, 37.5][i], q=55.1, q_p=0.004,
                            tau2_method="reml", boundary=i == 1))
    return _correct(rows)


def _mixed(values):
    rows = []
    for i, region in enumerate(REGIONS):
        for term, est, se, df in (("Intercept", 0.31, 0.06, 30.4), ("contrast[T.town2]", 0.1, 0.04, 61.2),
                                  ("contrast[T.town3]", 0.19, 0.05, 58.87)):
            t = est / se
            rows.append(_common(region, "mixed", term, contrast=np.nan, formula="value ~ contrast", n=32,
                                estimate=est, se=se, df=df, statistic=t, statistic_type="t",
                                p=2 * stats.t.sf(abs(t), df), ci_low=est - 2 * se, ci_high=est + 2 * se,
                                effect_size=np.nan, effect_size_type=np.nan, effect_size_ci_low=np.nan,
                                effect_size_ci_high=np.nan, df_method="satterthwaite", converged=i != 2,
                                boundary=i == 1, sd_participant=0.38, sd_residual=0.29, icc=0.63,
                                n_participants=32, n_observations=96))
    return _correct(rows)


@pytest.fixture(scope="session")
def participants():
    return _participants()


@pytest.fixture(scope="session")
def values(participants):
    return _values(participants)


@pytest.fixture(scope="session")
def results_by_design(values, participants):
    return {
        "one-sample": _one_sample(values),
        "paired": _paired(values),
        "two-group": _two_group(values, participants),
        "glm": _glm(values),
        "precision-weighted": _precision(values),
        "mixed": _mixed(values),
        "fixed-effects": _one_sample(values, design="fixed-effects"),
    }


@pytest.fixture(scope="session")
def results(results_by_design):
    return pd.concat(list(results_by_design.values()), ignore_index=True)
