"""``counterbid study``: the Monte Carlo validation study (CSV + PNG per table + summary.md)."""

from __future__ import annotations

import argparse
import datetime as dt
import shutil
import sys
import tempfile
import time
from pathlib import Path

FILES = ("accuracy_by_size", "accuracy_by_share", "interval_coverage")
FULL = {"sizes": (10, 100, 1000, 10_000, 100_000), "bidders": (2, 3, 5, 10), "reps": 200, "two_step_reps": 50,
        "share_reps": 100, "share_auctions": 10_000}
QUICK = {"sizes": (10, 100, 1000), "bidders": (3, 5), "reps": 20, "two_step_reps": 10, "share_reps": 10,
         "share_auctions": 1000}


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--out", default="docs/study", metavar="DIR", help="output folder (default docs/study)")
    p.add_argument("--quick", action="store_true", help="small sizes and few replicates (a smoke run)")
    p.add_argument("--reps", type=int, metavar="R", help="replicates per cell of the size study")
    p.add_argument("--two-step-reps", type=int, metavar="R", help="of those, replicates that also run the two-step baseline")
    p.add_argument("--share-reps", type=int, metavar="R", help="replicates per cell of the share study")
    p.add_argument("--share-auctions", type=int, metavar="A", help="auctions per experiment in the share study")
    p.add_argument("--sizes", type=int, nargs="+", metavar="N", help="bids per experiment in the size study")
    p.add_argument("--bidders", type=int, nargs="+", metavar="n", help="bidders per auction")
    p.add_argument("--seed", type=int, default=20260301)
    p.add_argument("--jobs", type=int, default=1, help="worker processes (results do not depend on it)")
    p.add_argument("--redraw", metavar="DIR",
                   help="redraw the figures and summary.md of DIR from its CSVs, without simulating "
                        "(the other options are ignored)")


def _settings(args: argparse.Namespace) -> dict:
    from counterbid.estimators.errors import InputError

    s = dict(QUICK if args.quick else FULL)
    for key in ("reps", "two_step_reps", "share_reps", "share_auctions", "sizes", "bidders"):
        if getattr(args, key) is not None:
            s[key] = tuple(getattr(args, key)) if key in ("sizes", "bidders") else getattr(args, key)
    if args.jobs < 1:
        raise InputError(f"--jobs must be >= 1; got {args.jobs}")
    return s


def _md_table(frame, *, floatfmt: str = "{:.4g}") -> str:
    """A pandas frame as a GitHub markdown table (index included)."""
    import pandas as pd

    frame = frame.copy()
    idx_names = [str(n) if n is not None else "" for n in frame.index.names]
    head = idx_names + [str(c) for c in frame.columns]
    lines = ["| " + " | ".join(head) + " |", "|" + "|".join(["---"] * len(idx_names) + ["---:"] * frame.shape[1]) + "|"]
    for key, row in frame.iterrows():
        key = key if isinstance(key, tuple) else (key,)
        cells = [str(k) for k in key]
        for v in row:
            cells.append("" if pd.isna(v) else (floatfmt.format(v) if isinstance(v, float) else str(v)))
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines)


def _figures(size, share, coverage, out: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    dists = list(dict.fromkeys(size["distribution"]))
    ns = sorted(size["n_bidders"].unique())
    colours = plt.get_cmap("viridis")([i / max(1, len(ns) - 1) * 0.85 for i in range(len(ns))])

    fig, axes = plt.subplots(1, len(dists), figsize=(4.2 * len(dists), 3.6), squeeze=False, sharey=False)
    for ax, d in zip(axes[0], dists):
        for c, n in zip(colours, ns):
            for method, style in (("ordstat", "-"), ("two_step", "--")):
                t = size.query("distribution == @d and n_bidders == @n and arm == 'treated' and method == @method")
                if len(t):
                    ax.plot(t["n_bids"], t["rmse_sqrt_n"], style, marker="o", ms=3, color=c,
                            label=f"n={n} {'estimator' if method == 'ordstat' else 'two-step'}")
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_title(f"{d} values")
        ax.set_xlabel("bids N")
    axes[0][0].set_ylabel("RMSE x sqrt(N), treated arm")
    axes[0][-1].legend(fontsize=7, ncol=2)
    fig.tight_layout()
    fig.savefig(out / "accuracy_by_size.png", dpi=110)
    plt.close(fig)

    sns = sorted(share["n_bidders"].unique())
    fig, axes = plt.subplots(len(dists), len(sns), figsize=(3.2 * len(sns), 2.8 * len(dists)), squeeze=False)
    for i, d in enumerate(dists):
        for j, n in enumerate(sns):
            ax = axes[i][j]
            for method, style, label in (("ordstat", "-o", "estimator"), ("informed_ab", "--s", "informed-bidder A/B test"),
                                         ("realized_average", ":^", "realized per-arm average")):
                t = share.query("distribution == @d and n_bidders == @n and method == @method").sort_values("share")
                ax.plot(t["share"], t["rmse"], style, ms=3, label=label)
            ax.set_xscale("log")
            ax.set_yscale("log")
            ax.set_title(f"{d}, n={n}", fontsize=9)
            if i == len(dists) - 1:
                ax.set_xlabel("treated share s")
            if j == 0:
                ax.set_ylabel("RMSE")
    axes[0][0].legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(out / "accuracy_by_share.png", dpi=110)
    plt.close(fig)

    cov = coverage[coverage["design"] == "size"]
    fig, axes = plt.subplots(1, len(dists), figsize=(4.2 * len(dists), 3.4), squeeze=False, sharey=True)
    for ax, d in zip(axes[0], dists):
        ax.axhspan(0.90, 0.99, color="0.9")
        ax.axhline(0.95, color="0.5", lw=0.8)
        for c, n in zip(colours, ns):
            t = cov.query("distribution == @d and n_bidders == @n and arm == 'treated'").sort_values("n_bids")
            ax.errorbar(t["n_bids"], t["coverage"], yerr=[t["coverage"] - t["coverage_low"], t["coverage_high"] - t["coverage"]],
                        marker="o", ms=3, capsize=2, color=c, label=f"n={n}")
        ax.set_xscale("log")
        ax.set_title(f"{d} values")
        ax.set_xlabel("bids N")
    axes[0][0].set_ylabel("coverage of 95% interval, treated arm")
    axes[0][-1].legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(out / "interval_coverage.png", dpi=110)
    plt.close(fig)


def _provenance(settings: dict, seconds: float) -> str:
    return (f"Generated by `counterbid study` on {dt.date.today().isoformat()} in {seconds / 60:.1f} minutes "
            f"(seed {settings['seed']}; size study {settings['reps']} replicates per cell, the two-step baseline on "
            f"the first {settings['two_step_reps']} of them; share study "
            f"{settings['share_reps']} replicates of {settings['share_auctions']} auctions). Raw numbers: "
            "`accuracy_by_size.csv`, `accuracy_by_share.csv`, `interval_coverage.csv`.")


def summary_markdown(size, share, coverage, *, settings: dict, seconds: float | None = None,
                     provenance: str | None = None) -> str:
    """The study's headline tables as markdown.

    ``provenance`` replaces the "Generated by" paragraph (a redraw keeps the run's own); without it
    the paragraph is built from ``settings`` and ``seconds``.
    """
    t = size[(size["arm"] == "treated")]
    est = t[t["method"] == "ordstat"].pivot_table(index=["distribution", "n_bidders"], columns="n_bids",
                                                 values="rmse_sqrt_n", sort=False)
    two = t[t["method"] == "two_step"].pivot_table(index=["distribution", "n_bidders"], columns="n_bids",
                                                  values="rmse_sqrt_n", sort=False)
    bias_z = t[t["method"] == "ordstat"].assign(z=lambda f: f["bias"] / f["bias_se"]).pivot_table(
        index=["distribution", "n_bidders"], columns="n_bids", values="z", sort=False)
    cov = coverage[(coverage["design"] == "size") & (coverage["arm"] == "treated")].pivot_table(
        index=["distribution", "n_bidders"], columns="n_bids", values="coverage", sort=False)
    sh = share.pivot_table(index=["distribution", "share", "method"], columns="n_bidders", values="rmse", sort=False)
    ratio = share[share["method"] != "informed_ab"].pivot_table(index=["distribution", "share", "method"],
                                                             columns="n_bidders", values="rmse_vs_informed", sort=False)
    shcov = coverage[(coverage["design"] == "share") & (coverage["method"] == "ordstat")].pivot_table(
        index=["distribution", "share"], columns="n_bidders", values="coverage", sort=False)
    lines = [
        "# Validation study of the per-arm revenue estimator",
        "",
        provenance if provenance is not None else _provenance(settings, seconds),
        "",
        "Design: two arms with position weights control = (0.31, 0.17, 0.06, 0.02) and treated = "
        "(0.36, 0.12, 0.05, 0.02); `n` bidders per auction; values per click uniform U[0, 2], "
        "Beta(2, 5) scaled to [0, 3], log-normal (sigma 0.5, median 0.8). Bids are the symmetric "
        "first-price equilibrium against the share-weighted mixture; truth is Myerson's formula by "
        "quadrature. So every number below rests on the estimator's own assumptions holding exactly "
        "(symmetric independent private values, equilibrium reached against the designed shares, "
        "known position weights); it says nothing about data where they fail.",
        "",
        "## RMSE x sqrt(N) of the treated arm's revenue per auction (share 0.5), by bids N",
        "",
        "Weighted order-statistic estimator (flat in N means root-N accuracy):",
        "",
        _md_table(est),
        "",
        "Two-step kernel baseline (Guerre, Perrigne & Vuong 2000), same simulated experiments:",
        "",
        _md_table(two),
        "",
        "Bias of the estimator in units of its Monte Carlo standard error (|z| < 2 expected in about "
        "19 cells of 20):",
        "",
        _md_table(bias_z, floatfmt="{:.2f}"),
        "",
        "![RMSE x sqrt(N)](accuracy_by_size.png)",
        "",
        "## RMSE of the treated arm's revenue per auction as its share falls",
        "",
        f"{_share_auctions(share)} auctions per experiment. `ordstat`: the estimator on all auctions' "
        "bids; `informed_ab`: bidders told the arm, only the treated arm's s x A auctions; `realized_average`: the "
        "realized per-arm average, realized revenue over the treated arm's own auctions (bidders answered the mixture).",
        "",
        _md_table(sh),
        "",
        "Same, relative to the informed-bidder A/B test's RMSE:",
        "",
        _md_table(ratio, floatfmt="{:.2f}"),
        "",
        "![RMSE vs share](accuracy_by_share.png)",
        "",
        "## Coverage of the estimator's 95 % intervals",
        "",
        "By bids N (share 0.5, treated arm):",
        "",
        _md_table(cov, floatfmt="{:.3f}"),
        "",
        "By treated share (treated arm):",
        "",
        _md_table(shcov, floatfmt="{:.3f}"),
        "",
        "![coverage](interval_coverage.png)",
        "",
        "## Reading the tables",
        "",
        *_findings(size, share, coverage),
        "",
    ]
    return "\n".join(lines)


def _findings(size, share, coverage) -> list[str]:
    """Data-driven sentences for the summary (ranges read off the tables above)."""
    import numpy as np

    est = size[size["method"] == "ordstat"].assign(z=lambda f: f["bias"] / f["bias_se"])
    n_min, n_big = int(est["n_bids"].min()), est["n_bids"] >= 1000
    small = est[est["n_bids"] == n_min]
    cov = coverage[(coverage["design"] == "size")]
    cov_big = cov[cov["n_bids"] >= 1000]
    cov_small = cov[cov["n_bids"] == n_min]
    out = [
        f"* Estimator bias: |z| < 2 in {int((np.abs(est.loc[n_big, 'z']) < 2).sum())} of {int(n_big.sum())} cells "
        f"(both arms) with N >= 1000; at N = {n_min} z runs from {small['z'].min():.1f} to {small['z'].max():.1f}: "
        f"a small-sample downward bias of up to {float((small['bias'].abs() / small['rmse']).max()):.0%} of the "
        "RMSE there.",
        f"* Coverage of the 95 % interval with N >= 1000: {cov_big['coverage'].min():.3f} to "
        f"{cov_big['coverage'].max():.3f}; at N = {n_min} only {cov_small['coverage'].min():.2f} to "
        f"{cov_small['coverage'].max():.2f} (the normal interval and its estimated variance are unreliable with "
        "a handful of auctions).",
    ]
    two = size[size["method"] == "two_step"]
    if len(two):
        n_max = int(size["n_bids"].max())
        a = est[est["n_bids"] == n_max].set_index(["distribution", "n_bidders", "arm"])["rmse"]
        b = two[two["n_bids"] == n_max].set_index(["distribution", "n_bidders", "arm"])["rmse"]
        r = (b / a).dropna()
        t = two[two["arm"] == "treated"].set_index(["distribution", "n_bidders", "n_bids"])["rmse_sqrt_n"]
        mid = 1000 if 1000 in set(two["n_bids"]) else int(two["n_bids"].min())
        growing = [f"{d} n={n}" for d, n in dict.fromkeys(zip(two["distribution"], two["n_bidders"]))
                   if t.get((d, n, n_max), np.nan) > 2 * t.get((d, n, mid), np.inf)]
        tb = two[two["n_bids"] == n_max]
        share_bias = float((tb["bias"].abs() / tb["rmse"]).median())
        out.append(f"* Two-step baseline at N = {n_max}: RMSE {r.min():.1f} to {r.max():.1f} times the estimator's; "
                   f"bias is a median {share_bias:.0%} of its RMSE there (kernel smoothing and boundary trimming, "
                   "which shrink only like the bandwidth). Its RMSE x sqrt(N) more than doubles from "
                   f"N = {mid} to {n_max} for: {', '.join(growing) if growing else 'none'}.")
    ratio = share[share["method"] == "ordstat"]
    s_min = float(share["share"].min())
    lo = ratio[ratio["share"] == s_min]["rmse_vs_informed"]
    realized = share[share["method"] == "realized_average"]
    out.append(f"* At share {s_min:g} the estimator's RMSE is {lo.min():.2f} to {lo.max():.2f} times the informed-bidder A/B "
               "test's: every auction's bids inform every arm, so its error barely moves with the share while the "
               f"informed-bidder test's grows like 1/sqrt(s). The realized per-arm average's RMSE is {realized['rmse_vs_informed'].min():.1f} to "
               f"{realized['rmse_vs_informed'].max():.1f} times the informed-bidder test's, almost all of it bias.")
    return out


def _share_auctions(share) -> str:
    values = sorted(int(v) for v in share["n_auctions"].unique())
    return " / ".join(str(v) for v in values)


#: Columns the redraw reads from each CSV (the figures and the summary use no others).
REDRAW_COLUMNS = {
    "accuracy_by_size": ("distribution", "n_bidders", "n_bids", "arm", "method", "runs", "bias", "bias_se", "rmse",
                         "rmse_sqrt_n"),
    "accuracy_by_share": ("distribution", "n_bidders", "share", "n_auctions", "method", "runs", "rmse",
                          "rmse_vs_informed"),
    "interval_coverage": ("design", "distribution", "n_bidders", "n_bids", "share", "arm", "method", "coverage",
                          "coverage_low", "coverage_high"),
}
_REDRAW_NOTE = "Figures and this summary redrawn from the CSVs by `counterbid study --redraw`"


def read_study(folder: Path) -> tuple:
    """The three study tables of ``folder`` (``accuracy_by_size``, ``accuracy_by_share``, ``interval_coverage``)."""
    import pandas as pd

    from counterbid.estimators.errors import InputError

    frames = []
    for name in FILES:
        path = folder / f"{name}.csv"
        if not path.is_file():
            raise InputError(f"{path}: no such file (the study's CSVs are {', '.join(f + '.csv' for f in FILES)})")
        try:
            frame = pd.read_csv(path)
        except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
            raise InputError(f"{path}: not a readable CSV ({str(exc).splitlines()[0]})") from None
        missing = [c for c in REDRAW_COLUMNS[name] if c not in frame.columns]
        if missing:
            raise InputError(f"{path}: missing column {missing[0]!r}")
        if frame.empty:
            raise InputError(f"{path}: no rows")
        frames.append(frame)
    return tuple(frames)


def _redraw(folder: Path) -> int:
    """Figures and summary.md of a finished study, from its CSVs (numbers untouched)."""
    import re

    size, share, coverage = read_study(folder)
    old = folder / "summary.md"
    kept = None
    if old.is_file():
        kept = next((line for line in old.read_text().splitlines() if line.startswith("Generated by")), None)
    if kept is None:
        two = size.loc[size["method"] == "two_step", "runs"]
        kept = (f"Tables and figures from the CSVs (size study {int(size.loc[size['method'] == 'ordstat', 'runs'].max())} "
                f"replicates per cell, the two-step baseline on {int(two.max()) if len(two) else 0}; share study "
                f"{int(share['runs'].max())} replicates of {_share_auctions(share)} auctions). Raw numbers: "
                "`accuracy_by_size.csv`, `accuracy_by_share.csv`, `interval_coverage.csv`.")
    kept = re.sub(r" " + re.escape(_REDRAW_NOTE) + r" on [0-9-]+\.$", "", kept)
    provenance = f"{kept} {_REDRAW_NOTE} on {dt.date.today().isoformat()}."
    text = summary_markdown(size, share, coverage, settings={}, provenance=provenance)
    with tempfile.TemporaryDirectory(dir=folder, prefix=".study-") as tmp:
        tmp = Path(tmp)
        _figures(size, share, coverage, tmp)
        (tmp / "summary.md").write_text(text)
        for f in sorted(tmp.iterdir()):
            shutil.move(str(f), str(folder / f.name))
    print(f"counterbid: study: redrew {len(FILES) + 1} files in {folder} from its CSVs", file=sys.stderr)
    return 0


def run(args: argparse.Namespace) -> int:
    from counterbid.estimators.study import coverage_table, share_study, size_study

    if args.redraw is not None:
        return _redraw(Path(args.redraw))
    s = _settings(args)
    s["seed"] = args.seed
    out = Path(args.out)
    t0 = time.perf_counter()
    print(f"counterbid: study: size design ({s['reps']} replicates per cell) ...", file=sys.stderr)
    size = size_study(bidders=s["bidders"], sizes=s["sizes"], reps=s["reps"], two_step_reps=s["two_step_reps"],
                      seed=args.seed, jobs=args.jobs)
    print(f"counterbid: study: share design ({s['share_reps']} replicates per cell) ...", file=sys.stderr)
    share = share_study(bidders=s["bidders"], n_auctions=s["share_auctions"], reps=s["share_reps"], seed=args.seed,
                        jobs=args.jobs)
    coverage = coverage_table(size, share)
    seconds = time.perf_counter() - t0
    out.mkdir(parents=True, exist_ok=True)
    # Write everything into a scratch folder beside the target, then move it into place.
    with tempfile.TemporaryDirectory(dir=out, prefix=".study-") as tmp:
        tmp = Path(tmp)
        for name, frame in zip(FILES, (size, share, coverage)):
            frame.to_csv(tmp / f"{name}.csv", index=False, float_format="%.6g")
        _figures(size, share, coverage, tmp)
        (tmp / "summary.md").write_text(summary_markdown(size, share, coverage, settings=s, seconds=seconds))
        for f in sorted(tmp.iterdir()):
            shutil.move(str(f), str(out / f.name))
    print(f"counterbid: study: wrote {len(FILES) * 2 + 1} files to {out} in {seconds:.0f} s", file=sys.stderr)
    return 0
