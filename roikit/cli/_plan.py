"""`roikit plan`: power, sample size and sensitivity for the next study (from assumptions or from a pilot)."""

from __future__ import annotations

import argparse
import math
import sys
import warnings
from pathlib import Path
from typing import TYPE_CHECKING

from .. import __version__
from .._options import plural
from ..errors import CautionWarning, DesignError, UsageError

if TYPE_CHECKING:  # annotations only; imported where used, so start-up stays fast
    import pandas as pd

_DESIGNS = ("one-sample", "paired", "two-group", "precision-weighted", "crossed")
_MAX_LINES = 12  # summary lines on stderr; the table holds every row
_LAYOUTS = ("fully-crossed", "stimuli-within-condition", "participants-within-condition", "both-within-condition")

#: Descriptions of the plan table's columns (written to the JSON sidecar, BIDS layout).
DESCRIPTIONS = {
    "design": "design planned: one-sample, paired, two-group, precision-weighted or crossed",
    "effect_size": "standardised effect size of the row (assumed, the pilot's, or, where solved_for is "
                   "effect_size, the smallest detectable one)",
    "effect_size_type": "d (mean / SD; two-group: mean difference / pooled SD), d_z (paired: mean difference / SD "
                        "of differences), d_total (precision-weighted: mean / sqrt(tau2 + mean first-level "
                        "variance)); crossed: d = effect / SD of one observation within a condition",
    "n": "participants (two-group: in the first group, per group when the groups are equal; crossed: in all)",
    "power": "probability of rejecting the null hypothesis at alpha_per_test (exact noncentral t, or the share of "
             "simulated studies; where solved_for is n, the power the n reaches)",
    "alpha": "family-wise alpha across the family of regions",
    "alpha_per_test": "alpha of each region's test: alpha / family_size under bonferroni and holm (holm planned as "
                      "bonferroni, the threshold for the smallest p), alpha under none",
    "family_size": "number of regions K in the family corrected for",
    "correction": "correction planned across the family: bonferroni, holm (planned as bonferroni) or none",
    "solved_for": "what the row computed: n (from effect size and power), power (from effect size and n) or "
                  "effect_size (the smallest detectable effect from n and power: sensitivity)",
    "target_power": "the power asked for",
    "n_second": "two-group: participants in the second group",
    "n_total": "participants in all groups",
    "df": "degrees of freedom of the t test",
    "ncp": "noncentrality parameter of the t statistic",
    "critical_t": "critical value of t at alpha_per_test",
    "alternative": "two-sided, greater or less",
    "region": "region of the pilot",
    "term": "term of the pilot's results",
    "pilot_n": "participants in the pilot's test of this region",
    "pilot_effect_size_type": "effect size type in the pilot's results (g is planned with as d)",
    "safeguard_confidence": "two-sided confidence level whose limit nearer zero is the safeguard effect size "
                            "(Perugini, Gallucci & Costantini 2014 recommend 0.60)",
    "safeguard_effect_size": "the pilot effect's confidence limit nearer zero",
    "safeguard_n": "n needed for the target power at the safeguard effect size (n/a when the interval includes 0)",
    "safeguard_n_second": "two-group: second group's n for the safeguard plan",
    "safeguard_power": "power the safeguard n reaches at the safeguard effect size",
    "note": "why a value is n/a",
    "method": "simulation (seeded simulated studies) or exact-balanced (noncentrality and Satterthwaite df of a "
              "balanced design)",
    "mc_se": "Monte Carlo standard error of a simulated power: sqrt(power (1 - power) / simulations)",
    "simulations": "simulated studies behind a simulated power",
    "seed": "seed of the simulation (repeat the run with --seed to get the same numbers)",
    "mean": "precision-weighted: population mean assumed (units of the values)",
    "tau2": "precision-weighted: between-participant variance assumed",
    "mean_variance": "precision-weighted: mean of the first-level variances drawn from",
    "power_t_approx": "precision-weighted: exact one-sample t power at d_total (equal first-level variances), "
                      "for comparison",
    "null_rejection": "precision-weighted: share of the same simulated studies with the mean set to 0 that reject "
                      "(the test's actual size; compare with alpha_per_test)",
    "null_rejection_mc_se": "Monte Carlo standard error of null_rejection",
    "n_participants": "crossed: participants",
    "n_stimuli": "crossed: stimuli",
    "layout": "crossed: which factor the conditions vary within (Westfall, Kenny & Judd 2014)",
    "effect": "crossed: condition difference assumed (units of the values)",
    "se": "crossed: standard error of the condition difference",
    "power_limit": "crossed: power with unlimited participants at this number of stimuli: the limit a finite "
                   "stimulus sample sets (power can approach it from above while the participants still add df)",
    "power_exact_balanced": "crossed: power by the noncentral t with the balanced-design noncentrality and "
                            "Satterthwaite df at the expected mean squares (an approximation, optimistic when "
                            "participants or stimuli are few); the power column is the simulated quasi-F test's",
    "sd_participant": "crossed: SD of the participant intercepts used",
    "sd_stimulus": "crossed: SD of the stimulus intercepts used",
    "sd_participant_slope": "crossed: SD of the participant-by-condition slopes used",
    "sd_stimulus_slope": "crossed: SD of the stimulus-by-condition slopes used",
    "sd_residual": "crossed: residual SD used",
}


def _list(text, name: str, kind=float) -> list:
    if text is None:
        return []
    out = []
    for part in str(text).split(","):
        part = part.strip()
        try:
            value = kind(part)
            if kind is int and float(part) != value:
                raise ValueError
        except ValueError:
            what = "whole numbers" if kind is int else "numbers"
            example = "20,30,40" if kind is int else "0.3,0.5"
            raise UsageError(f"{name}: expected comma-separated {what} (e.g. {example}), got {text!r}") from None
        out.append(value)
    return out


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "plan",
        help="power, sample size and sensitivity for the next study (from assumptions or a pilot)",
        description="Plan the next study. With two of --effect-size, --n and --power: the n needed, the power, or "
        "the smallest detectable effect (exact noncentral t; one-sample, paired, two-group), at the alpha per test "
        "that the correction over --regions K leaves. With --from RESULTS.tsv (a `roikit stats` table): the n each "
        "region needs for its observed effect and for the lower confidence limit of it (safeguard power). "
        "Precision-weighted designs are planned by seeded simulation, the crossed participants x stimuli design "
        "by the exact balanced-design noncentrality (Westfall, Kenny & Judd 2014). Writes PLAN.tsv with a JSON "
        "sidecar. For research planning, not for clinical decisions.",
    )
    p.add_argument("--design", choices=_DESIGNS, metavar="DESIGN",
                   help="one-sample, paired, two-group, precision-weighted or crossed (with --from: the pilot's)")
    p.add_argument("--effect-size", metavar="D[,D...]",
                   help="assumed effect: d (one-sample, two-group), d_z (paired); precision-weighted: the mean, "
                   "crossed: the condition difference, both in the values' units")
    p.add_argument("--n", metavar="N[,N...]", help="participants (two-group: per group, or the first group with "
                   "--ratio; crossed: in all)")
    p.add_argument("--power", type=float, metavar="P", help="target power, e.g. 0.8")
    p.add_argument("--alpha", type=float, default=0.05, metavar="A", help="family-wise alpha (default 0.05)")
    p.add_argument("--regions", type=int, default=None, metavar="K",
                   help="regions in the family (default 1; with --from the regions of the pilot's table)")
    p.add_argument("--correct", choices=("holm", "bonferroni", "none"), default="holm",
                   help="correction across the K regions (default holm, planned as bonferroni)")
    p.add_argument("--alternative", choices=("two-sided", "greater", "less"), default="two-sided",
                   help="t designs: alternative hypothesis (default two-sided)")
    p.add_argument("--ratio", type=float, default=1.0, metavar="R",
                   help="two-group: second group's size over the first's (default 1)")
    g = p.add_argument_group("from a pilot")
    g.add_argument("--from", dest="pilot", metavar="RESULTS.tsv", help="results of a pilot (`roikit stats`)")
    g.add_argument("--term", metavar="TERM", help="term of the pilot's results to plan for (when there are several)")
    g.add_argument("--safeguard", type=float, default=0.60, metavar="LEVEL",
                   help="confidence level of the safeguard limit (default 0.60, Perugini et al. 2014)")
    g.add_argument("--values", metavar="VALUES.tsv",
                   help="precision-weighted: region values table whose variance column gives the first-level "
                   "variances to draw from")
    g.add_argument("--contrast", metavar="C", help="precision-weighted: contrast of --values (default: the pilot's)")
    g.add_argument("--tau2", type=float, metavar="T", help="precision-weighted without --from: tau2 assumed")
    c = p.add_argument_group("crossed participants x stimuli design")
    c.add_argument("--layout", choices=_LAYOUTS, metavar="LAYOUT",
                   help="which factor the conditions vary within: " + ", ".join(_LAYOUTS))
    c.add_argument("--stimuli", metavar="Q[,Q...]", help="numbers of stimuli (the grid's second axis)")
    for name, what in (("participant", "participant intercepts"), ("stimulus", "stimulus intercepts"),
                       ("participant-slope", "participant-by-condition slopes"),
                       ("stimulus-slope", "stimulus-by-condition slopes"),
                       ("residual", "residuals (one observation per participant and stimulus)")):
        c.add_argument(f"--sd-{name}", type=float, metavar="SD", help=f"SD of the {what} (overrides the pilot's)")
    s = p.add_argument_group("simulation")
    s.add_argument("--simulations", type=int, default=None, metavar="N",
                   help="simulated studies per grid point (default 2000); precision-weighted: fitted by the kit's "
                   "estimator; crossed: tested by the quasi-F of each study, beside the exact-balanced power")
    s.add_argument("--seed", type=int, default=None, metavar="S", help="seed of the simulation (recorded)")
    p.add_argument("--out", required=True, metavar="PLAN.tsv", help="output table")
    p.add_argument("--figure", metavar="FILE", help="power-curve figure (PDF, SVG and 300-dpi PNG beside FILE)")
    p.add_argument("--overwrite", action="store_true", help="replace existing output files")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    import numpy as np  # noqa: F401 - imported here, not at start-up (roikit --help stays fast)
    import pandas as pd  # noqa: F401

    from .._tables import check_output, read_table, sha256_file, sidecar_path, write_table  # noqa: F401
    from ..stats import power as pw

    out = check_output(args.out, overwrite=args.overwrite)
    check_output(sidecar_path(out), overwrite=args.overwrite)
    if args.regions is not None and args.regions < 1:
        raise UsageError(f"--regions must be at least 1, got {args.regions}")
    if args.simulations is not None and args.simulations < 10:
        raise UsageError(f"--simulations must be at least 10, got {args.simulations}")
    if args.seed is not None and args.seed < 0:
        raise UsageError(f"--seed must be a non-negative integer, got {args.seed}")
    notes: list[str] = []
    inputs: dict = {}
    pilot = None
    if args.pilot:
        pilot = read_table(args.pilot)
        inputs["results"] = {"path": str(Path(args.pilot)), "sha256": sha256_file(args.pilot)}
        if "design" not in pilot.columns:
            raise DesignError(f"--from {args.pilot}: no 'design' column; expected a `roikit stats` results table")
        designs = list(pd.unique(pilot["design"].astype(str)))
        if args.design:  # select the pilot's rows of this design (crossed plans come from mixed results)
            wanted = "mixed" if args.design == "crossed" else args.design
            if wanted not in designs:
                raise DesignError(f"--from {args.pilot}: no rows of design {wanted!r}; the table holds "
                                  f"{', '.join(designs)}")
            pilot = pilot[pilot["design"].astype(str) == wanted].reset_index(drop=True)
            designs = [wanted]
        if len(designs) != 1:
            raise UsageError(f"--from {args.pilot}: the table holds several designs ({', '.join(designs)}); choose "
                             "one with --design")
        design = "crossed" if designs[0] == "mixed" else designs[0]
    else:
        if not args.design:
            raise UsageError("give --design DESIGN (or --from RESULTS.tsv to plan from a pilot)")
        design = args.design
    if args.ratio != 1.0 and design != "two-group":
        raise UsageError(f"--ratio applies to the two-group design only, not {design}; drop --ratio")
    if args.alternative != "two-sided" and design not in pw.T_DESIGNS:
        raise UsageError(f"--alternative {args.alternative}: the {design} design is planned two-sided only; drop "
                         "--alternative")
    for option, value in (("--layout", args.layout), ("--stimuli", args.stimuli)):
        if value is not None and design != "crossed":
            raise UsageError(f"{option} applies to the crossed design only, not {design}; drop {option}")
    effects = _list(args.effect_size, "--effect-size")
    ns = _list(args.n, "--n", int)
    family = args.regions if args.regions is not None else 1

    if design in pw.T_DESIGNS and pilot is None:
        table = pw.plan_t(design=design, effect_size=effects or None, n=ns or None, power=args.power,
                          alpha=args.alpha, family_size=family, correction=args.correct,
                          alternative=args.alternative, ratio=args.ratio)
        summary = _t_summary(table)
    elif design in pw.T_DESIGNS:
        if args.power is None:
            raise UsageError("--from needs --power P (the target power, e.g. 0.8)")
        if effects or ns:
            raise UsageError("--from takes the effect sizes and n from the pilot; drop --effect-size and --n")
        table = pw.plan_from_results(pilot, power=args.power, alpha=args.alpha, family_size=args.regions,
                                     correction=args.correct, safeguard=args.safeguard, term=args.term,
                                     alternative=args.alternative)
        notes.append(pw.INFLATION_NOTE)
        warnings.warn(pw.INFLATION_NOTE, CautionWarning, stacklevel=2)
        summary = _pilot_summary(table)
    elif design == "precision-weighted":
        table, summary = _precision(args, pilot, effects, ns, family, inputs, notes, pw)
    else:
        table, summary = _crossed(args, pilot, effects, ns, family, notes, pw)

    family_size = int(table["family_size"].iat[0])
    correction = str(table["correction"].iat[0])
    if correction == "holm":
        notes.append(pw.HOLM_NOTE)
    if family_size > 1 and correction == "none":
        msg = (f"the family of {family_size} regions is planned uncorrected (--correct none): the chance of at least "
               "one false positive across them exceeds alpha")
        notes.append(msg)
        warnings.warn(msg, CautionWarning, stacklevel=2)
    if family_size == 1 and pilot is None and args.regions is None:
        notes.append("planned for one test (family of 1 region); with K regions give --regions K")

    written_figure = []
    if args.figure:
        written_figure = _figure(args, table, design)
    seeds = table["seed"].dropna().unique().tolist() if "seed" in table.columns else []
    sidecar = {c: {"Description": DESCRIPTIONS.get(c, "see roikit.stats.power")} for c in table.columns}
    sidecar["GeneratedBy"] = {
        "Name": "roikit", "Version": __version__, "Command": "roikit plan",
        "Options": {"design": design, "effect_size": effects or None, "n": ns or None, "power": args.power,
                    "alpha": args.alpha, "regions": args.regions, "correct": args.correct,
                    "alternative": args.alternative, "ratio": args.ratio, "from": args.pilot, "term": args.term,
                    "safeguard": args.safeguard, "values": args.values, "contrast": args.contrast,
                    "tau2": args.tau2, "layout": args.layout, "stimuli": args.stimuli,
                    "simulations": args.simulations, "seed": seeds[0] if seeds else args.seed},
        "Inputs": inputs,
        "Figure": [str(f) for f in written_figure],
        "Notes": notes + ["For research planning, not for clinical decisions."],
    }
    path = write_table(out, table, sidecar=sidecar, overwrite=args.overwrite)
    shown = summary if len(summary) <= _MAX_LINES else summary[: _MAX_LINES - 1]
    for line in shown:
        sys.stderr.write(f"roikit plan: {line}\n")
    if len(shown) < len(summary):
        sys.stderr.write(f"roikit plan: ... {plural(len(summary) - len(shown), 'more row')} in {path}\n")
    for note in notes:
        if note != pw.INFLATION_NOTE and not note.startswith("the family"):
            sys.stderr.write(f"roikit plan: note: {note}\n")
    sys.stderr.write(f"roikit plan: {plural(len(table), 'row')} -> {path}"
                     + (f"; figure {written_figure[-1]}" if written_figure else "") + "\n")
    return 0


def _alpha(a: float) -> str:
    return f"{a:.4g}"


def _t_summary(table: pd.DataFrame) -> list[str]:
    import numpy as np  # noqa: F401 - imported here, not at start-up (roikit --help stays fast)
    import pandas as pd  # noqa: F401

    from .._tables import check_output, read_table, sha256_file, sidecar_path, write_table  # noqa: F401
    lines = []
    for r in table.itertuples():
        what = f"{r.design}, {r.effect_size_type} = {r.effect_size:.3f}, n = {r.n}"
        if r.design == "two-group":
            what += f" + {r.n_second}"
        lines.append(f"{what}: power {r.power:.3f} at alpha {_alpha(r.alpha_per_test)} per test"
                     + {"n": " (n solved for the target)", "effect_size": " (smallest detectable effect)",
                        "power": ""}[r.solved_for])
    return lines


def _pilot_summary(table: pd.DataFrame) -> list[str]:
    import numpy as np  # noqa: F401 - imported here, not at start-up (roikit --help stays fast)
    import pandas as pd  # noqa: F401

    from .._tables import check_output, read_table, sha256_file, sidecar_path, write_table  # noqa: F401
    lines = []
    for r in table.itertuples():
        head = f"{r.region}: {r.effect_size_type} = {r.effect_size:.3f}"
        if pd.isna(r.n):
            lines.append(f"{head}: {r.note}")
            continue
        safe = (f"safeguard {r.safeguard_effect_size:.3f} needs n = {int(r.safeguard_n)}"
                if pd.notna(r.safeguard_n) else str(r.note))
        lines.append(f"{head} needs n = {int(r.n)}; {safe}")
    return lines


def _precision(args, pilot, effects, ns, family, inputs, notes, pw):
    import numpy as np  # noqa: F401 - imported here, not at start-up (roikit --help stays fast)
    import pandas as pd  # noqa: F401

    from .._tables import check_output, read_table, sha256_file, sidecar_path, write_table  # noqa: F401
    if not ns:
        raise UsageError("precision-weighted plans are simulated on a grid of participants: give --n N[,N...]")
    if not args.values:
        raise UsageError("precision-weighted plans draw first-level variances from a values table: give "
                         "--values VALUES.tsv (written by `roikit extract --variance`)")
    values = read_table(args.values)
    inputs["values"] = {"path": str(Path(args.values)), "sha256": sha256_file(args.values)}
    if "variance" not in values.columns:
        raise DesignError(f"--values {args.values}: no 'variance' column; extract with --variance PATTERN")
    sims = args.simulations or 2000
    if pilot is not None:
        if args.tau2 is not None or effects:
            raise UsageError("--from takes the mean and tau2 from the pilot; drop --effect-size and --tau2")
        needed = {"region", "estimate", "tau2", "term"}
        if not needed <= set(pilot.columns):
            raise DesignError(f"--from {args.pilot}: columns {', '.join(sorted(needed - set(pilot.columns)))} "
                              "missing; expected precision-weighted results")
        rows = pilot[pilot["term"].astype(str) == (args.term or "mean")]
        if rows.empty:
            raise DesignError(f"--from {args.pilot}: no rows with term {args.term or 'mean'!r}; give --term")
        contrast = args.contrast or (str(rows["contrast"].iat[0]) if "contrast" in rows else None)
        plans = [(str(r.region), float(r.estimate), float(r.tau2)) for r in rows.itertuples()]
        K = args.regions if args.regions is not None else len(plans)
        notes.append(pw.INFLATION_NOTE)
        warnings.warn(pw.INFLATION_NOTE, CautionWarning, stacklevel=3)
    else:
        if args.tau2 is None or not effects:
            raise UsageError("precision-weighted without --from needs --effect-size MEAN and --tau2 T")
        contrast = args.contrast
        plans = [(None, m, args.tau2) for m in effects]
        K = family
    if contrast is None and values["contrast"].nunique() > 1:
        raise UsageError(f"--values {args.values} holds several contrasts; choose one with --contrast C")
    sel = values if contrast is None else values[values["contrast"].astype(str) == str(contrast)]
    if sel.empty:
        raise DesignError(f"--values {args.values}: no rows for contrast {contrast!r}")
    frames = []
    seed = args.seed
    if seed is None:
        seed = int(np.random.SeedSequence().entropy % (2**63))
    for k, (region, mean, tau2) in enumerate(plans):
        v = sel["variance"] if region is None else sel.loc[sel["region"].astype(str) == region, "variance"]
        if region is not None and v.dropna().empty:
            v = sel["variance"]  # region absent from the values table: all regions' variances
            notes.append(f"{region}: not in --values; its first-level variances are drawn from all regions")
        frame = pw.simulate_precision_weighted(mean, tau2=tau2, variances=v.to_numpy(float), n=ns, alpha=args.alpha,
                                               family_size=K, correction=args.correct, simulations=sims,
                                               seed=np.random.default_rng([seed, k]))
        frame["seed"] = seed
        if args.power is not None:
            frame["target_power"] = args.power
        if region is not None:
            frame.insert(9, "region", region)
        frames.append(frame)
    table = pd.concat(frames, ignore_index=True)
    summary = [f"{r.region + ': ' if 'region' in table and isinstance(r.region, str) else ''}mean {r.mean:.3g}, "
               f"tau2 {r.tau2:.3g}, n = {r.n}: power {r.power:.3f} (MC SE {r.mc_se:.3f}; t approximation "
               f"{r.power_t_approx:.3f})" for r in table.itertuples()]
    return table, summary


def _crossed(args, pilot, effects, ns, family, notes, pw):
    import numpy as np  # noqa: F401 - imported here, not at start-up (roikit --help stays fast)
    import pandas as pd  # noqa: F401

    from .._tables import check_output, read_table, sha256_file, sidecar_path, write_table  # noqa: F401
    if not ns or not args.stimuli:
        raise UsageError("the crossed design is planned on a grid: give --n P[,P...] (participants) and "
                         "--stimuli Q[,Q...]")
    if not args.layout:
        raise UsageError("the crossed design needs --layout: " + ", ".join(_LAYOUTS)
                         + " (a between-group effect with every participant seeing every stimulus is "
                         "participants-within-condition)")
    qs = _list(args.stimuli, "--stimuli", int)
    override = {"participant": args.sd_participant, "stimulus": args.sd_stimulus,
                "participant_slope": args.sd_participant_slope, "stimulus_slope": args.sd_stimulus_slope,
                "residual": args.sd_residual}
    for name, value in override.items():
        if value is not None and not (math.isfinite(value) and value >= 0):
            raise UsageError(f"--sd-{name.replace('_', '-')} must be a non-negative SD, got {value}")
    plans = []
    if pilot is not None:
        if effects:
            raise UsageError("--from takes the effect from the pilot; drop --effect-size")
        terms = [t for t in pd.unique(pilot["term"].astype(str)) if t not in ("Intercept", "(Intercept)")]
        term = args.term or (terms[0] if len(terms) == 1 else None)
        if term is None:
            raise UsageError(f"--from {args.pilot}: several terms ({', '.join(terms)}); choose one with --term")
        rows = pilot[pilot["term"].astype(str) == term]
        if rows.empty:
            raise DesignError(f"--from {args.pilot}: no rows with term {term!r}; available: {', '.join(terms)}")
        crossed = str(rows["crossed"].iat[0]) if "crossed" in rows and pd.notna(rows["crossed"].iat[0]) else None
        stim_col = f"sd_{crossed}" if crossed else None
        for r in rows.itertuples():
            rec = r._asdict()
            sds = {"participant": rec.get("sd_participant"), "stimulus": rec.get(stim_col) if stim_col else None,
                   "participant_slope": None, "stimulus_slope": None, "residual": rec.get("sd_residual")}
            plans.append((str(r.region), float(r.estimate), sds))
        if override["stimulus_slope"] is None and args.layout in ("fully-crossed", "participants-within-condition"):
            notes.append("the pilot model has no stimulus-by-condition random slope (roikit's mixed design gives a "
                         "crossed factor a random intercept only): it is taken as 0, so the stimuli limit power only "
                         "through the residual; if stimuli may differ in their condition effect, give "
                         "--sd-stimulus-slope SD (a model that leaves such a variance out overstates the evidence)")
        if override["participant_slope"] is None and args.layout in ("fully-crossed", "stimuli-within-condition"):
            notes.append("no participant-by-condition slope SD from the pilot: taken as 0 unless "
                         "--sd-participant-slope SD is given")
        notes.append(pw.INFLATION_NOTE)
        warnings.warn(pw.INFLATION_NOTE, CautionWarning, stacklevel=3)
        K = args.regions if args.regions is not None else len(plans)
    else:
        if not effects:
            raise UsageError("the crossed design needs --effect-size B (the condition difference in the values' "
                             "units) or --from RESULTS.tsv of a mixed design")
        plans = [(None, b, {k: None for k in override}) for b in effects]
        K = family
    frames = []
    seed = args.seed if args.seed is not None else int(np.random.SeedSequence().entropy % (2**63))
    for k, (region, effect, sds) in enumerate(plans):
        sd = {name: (override[name] if override[name] is not None else sds.get(name)) for name in override}
        sd = {name: (0.0 if value is None or not math.isfinite(float(value)) else float(value))
              for name, value in sd.items()}
        if sd["residual"] <= 0:
            raise UsageError("the crossed design needs a residual SD > 0: give --sd-residual SD (or a pilot with "
                             "sd_residual)")
        grid = pw.crossed_power(effect, layout=args.layout, participants=ns, stimuli=qs,
                                var_participant=sd["participant"] ** 2, var_stimulus=sd["stimulus"] ** 2,
                                var_participant_slope=sd["participant_slope"] ** 2,
                                var_stimulus_slope=sd["stimulus_slope"] ** 2, var_residual=sd["residual"] ** 2,
                                alpha=args.alpha, family_size=K, correction=args.correct,
                                simulations=args.simulations or 2000, seed=np.random.default_rng([seed, k]))
        grid["seed"] = seed
        for name, value in sd.items():
            grid[f"sd_{name}"] = value
        if args.power is not None:
            grid["target_power"] = args.power
        if region is not None:
            grid.insert(9, "region", region)
        frames.append(grid)
    table = pd.concat(frames, ignore_index=True)
    summary = []
    for r in table.itertuples():
        summary.append(f"{r.region + ': ' if isinstance(getattr(r, 'region', None), str) else ''}"
                       f"{r.n_participants} participants x {r.n_stimuli} stimuli: power {r.power:.3f} (MC SE "
                       f"{r.mc_se:.3f}; exact-balanced approximation {r.power_exact_balanced:.3f}); with unlimited "
                       f"participants {r.power_limit:.3f}")
    return table, summary


def _figure(args, table: pd.DataFrame, design: str) -> list:
    import numpy as np  # noqa: F401 - imported here, not at start-up (roikit --help stays fast)
    import pandas as pd  # noqa: F401

    from .._tables import check_output, read_table, sha256_file, sidecar_path, write_table  # noqa: F401
    from ..reporting.figures import save_figure
    from ..reporting.power import crossed_power_figure, power_curve, simulated_power_figure

    if design == "crossed":
        if "region" in table and table["region"].nunique() > 1:
            # one region per figure: the one whose plan reaches the highest power on the grid
            best = table.loc[table["power"].astype(float).idxmax(), "region"]
            table = table[table["region"] == best]
        ax = crossed_power_figure(table)
    elif design == "precision-weighted":
        ax = simulated_power_figure(table)
    else:
        ax = power_curve(table)
    return save_figure(ax.figure, args.figure, overwrite=args.overwrite)
