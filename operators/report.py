"""The results report: HTML with PNG plots of per-arm revenue, the realized per-arm average and the lift.

Reads only the results database (through :class:`~counterbid.operators.hooks.ResultsHook`); the
data-check status per day is shown when the ``data_checks`` table exists.
"""

from __future__ import annotations

import datetime as dt
import html
import math
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.dates as mdates  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402
import pandas as pd  # noqa: E402

from counterbid.estimators import MIXTURE_ARM  # noqa: E402
from counterbid.estimators.intervals import POPULATION, format_level  # noqa: E402
from counterbid.estimators.window import PENDING_FLAGS  # noqa: E402

from .hooks import ResultsHook  # noqa: E402

__all__ = [
    "ANYTIME_NOTE", "ASSUMPTIONS", "EXPECTED_FLAGS", "MIXTURE_GAP_SE", "anytime_caption", "attention_flags", "auction_caption",
    "CANDIDATES_NOTE", "candidate_table", "cumulative_table", "day_status", "format_cumulative", "interval_caption",
    "segment_lift_table", "what_if_table", "window_caption", "write_report",
]

#: What every number in the report rests on.
ASSUMPTIONS = (
    "Symmetric bidders with independent private values.",
    "Bids in equilibrium against the designed mixture of arms (bidders have adapted to the experiment).",
    "Position weights known: taken from the spec, or measured from the click log where the spec says so.",
    "The payment rule and floor of the auction that ran are as the spec states (listed per experiment below); "
    "bids below the floor are logged unshown, and with quality factors auctions rank by bid x quality. The payment "
    "rule an arm would use itself does not enter its revenue (revenue equivalence): only its position weights and "
    "the floor do.",
    "Welfare per auction is published without an interval (status flag no_interval): it weighs the highest bid with a "
    "point mass, whose spread makes normal intervals under-cover where values are heavy-tailed.",
)


def auction_caption(rows: pd.DataFrame) -> str:
    """The payment rule and floor stored with some rows, e.g. ``'gsp, floor 0.05'`` (several: each with its days)."""
    if rows.empty or "payment_rule" not in rows:
        return "not recorded"
    floors = rows["floor"].astype(float)
    pairs = list(dict.fromkeys(zip(rows["payment_rule"].astype(str), floors)))

    def one(rule, floor):
        return f"{rule}, {'floor ' + format(floor, 'g') if floor > 0 else 'no floor'}"

    if len(pairs) == 1:
        return one(*pairs[0])
    days = rows.groupby([rows["payment_rule"].astype(str), floors])["ds"].nunique()
    return "; ".join(f"{one(r, f)} ({days[(r, f)]} days)" for r, f in pairs)
#: Days whose estimated and realized mixture revenue differ by more than this many standard errors
#: are flagged: in equilibrium the two agree, so a gap is a sign bidders have not adapted.
MIXTURE_GAP_SE = 3.0
_LABELS = {
    "revenue_per_auction": "revenue / auction",
    "welfare_per_auction": "welfare / auction",
    "realized_revenue_per_auction": "realized per-arm average",
    "revenue_lift_vs_control": "lift vs control",
}


#: Which experiment-to-date band to act on (docs/method.md, "Looking every day").
ANYTIME_NOTE = ("Act on the anytime-valid bounds when the experiment to date is looked at day after day: they hold at "
                "every look at once. The fixed interval holds only at a single look planned before the start, "
                "at the planned end.")


def _has_anytime(rows: pd.DataFrame) -> bool:
    return "anytime_low" in rows.columns and rows["anytime_low"].notna().any()


def anytime_caption(rows: pd.DataFrame) -> str:
    """What the anytime-valid bounds of some to-date rows are tuned for, from the rows themselves."""
    if not _has_anytime(rows):
        return "anytime-valid bounds: not stored (rows written before schema version 3)"
    with_bounds = rows[rows["anytime_low"].notna()]
    horizon = int(with_bounds["anytime_horizon_auctions"].max())
    levels = " / ".join(format_level(lv) for lv in dict.fromkeys(with_bounds["confidence_level"].astype(float)))
    return (f"anytime-valid bounds ('anytime [low, high]'): {levels} for every daily look at once, same clustering, "
            f"tightest at {horizon:,} auctions (the planned end)")


def cumulative_table(hook: ResultsHook) -> pd.DataFrame:
    """Current experiment-to-date estimates of every experiment (view ``arm_estimates_cumulative``)."""
    return hook.fetch_df("report_cumulative")


def _interval(est, lo, hi, *, pct=False) -> str:
    if est is None or (isinstance(est, float) and math.isnan(est)):
        return "n/a"
    if lo is None or hi is None or (isinstance(lo, float) and math.isnan(lo)) or (isinstance(hi, float) and math.isnan(hi)):
        # published without an interval (welfare: status 'no_interval'); never print "[nan, nan]"
        return f"{est:+.2%} (no interval)" if pct else f"{est:.4f} (no interval)"
    if pct:
        return f"{est:+.2%} [{lo:+.2%}, {hi:+.2%}]"
    return f"{est:.4f} [{lo:.4f}, {hi:.4f}]"


def _how(rows: pd.DataFrame) -> list[tuple[float, str]]:
    """Distinct (confidence level, clustering) pairs of some stored rows, in first-seen order."""
    return list(dict.fromkeys(zip(rows["confidence_level"].astype(float), rows["cluster"].astype(str))))


def interval_caption(rows: pd.DataFrame) -> str:
    """How the intervals of ``rows`` were computed, from the rows themselves.

    ``'97.5 %, clustered by bidder'`` when every row agrees, else each pair with its number of
    days, e.g. ``'95 %, clustered by auction (3 days); 97.5 %, clustered by bidder (2 days)'``.
    """
    pairs = _how(rows)
    if not pairs:
        return "no intervals"
    if len(pairs) == 1:
        level, cluster = pairs[0]
        return f"{format_level(level)}, clustered by {cluster}"
    days = rows.groupby([rows["confidence_level"].astype(float), rows["cluster"].astype(str)])["ds"].nunique()
    return "; ".join(f"{format_level(lv)}, clustered by {cl} ({days[(lv, cl)]} days)" for lv, cl in pairs)


def _wide(rows: pd.DataFrame) -> pd.DataFrame:
    """One row per arm, one column per metric, values ``estimate [ci_low, ci_high]``.

    Each column's header says the level and clustering of its intervals (read from the rows).
    """
    out = {}
    headers = {}
    for metric, m_rows in rows.groupby("metric", sort=False):
        how = "; ".join(f"{format_level(lv)}, by {cl}" for lv, cl in _how(m_rows))
        headers[_LABELS.get(metric, metric)] = f"{_LABELS.get(metric, metric)} ({how})"
    anytime = _has_anytime(rows)
    for (arm, metric), r in rows.set_index(["arm", "metric"]).iterrows():
        pct = metric == "revenue_lift_vs_control"
        cell = _interval(r["estimate"], r["ci_low"], r["ci_high"], pct=pct)
        if anytime and pd.notna(r["anytime_low"]) and pd.notna(r["anytime_high"]):
            lo, hi = (f"{r['anytime_low']:+.2%}", f"{r['anytime_high']:+.2%}") if pct else \
                (f"{r['anytime_low']:.4f}", f"{r['anytime_high']:.4f}")
            cell += f" anytime [{lo}, {hi}]"
        out.setdefault(arm, {})[_LABELS.get(metric, metric)] = cell
    frame = pd.DataFrame.from_dict(out, orient="index")
    cols = [c for c in _LABELS.values() if c in frame.columns]
    arms = [a for a in frame.index if a != MIXTURE_ARM] + ([MIXTURE_ARM] if MIXTURE_ARM in frame.index else [])
    return frame.loc[arms, cols].fillna("").rename(columns=headers)


WHAT_IF_NOTE = ("These layouts did not run: their numbers come from the same bids as the arms' and rest on the same "
                "assumptions as every other counterfactual row, plus one more: that bidders would respond to each "
                "layout as they would if it ran. Effective share: the share of these auctions that, bid for the "
                "layout itself, would estimate it as precisely (above 1, the mixture's bids say more about it than "
                "its own would); 'thin support' marks a layout the bids say too little about, shown without a number "
                "(docs/method.md, 'Layouts that did not run').")


def _rows_where(rows: pd.DataFrame, column: str, test) -> pd.Series:
    """``test(rows[column])`` as a row mask; no row when the rows predate ``column``."""
    if column not in rows.columns:
        return pd.Series(False, index=rows.index)
    return test(rows[column])


def _is_what_if(rows: pd.DataFrame) -> pd.Series:
    """Rows of layouts that did not run (null on rows stored before schema version 5: arms)."""
    return _rows_where(rows, "what_if", lambda col: col.fillna(False).astype(bool))


def what_if_table(rows: pd.DataFrame) -> pd.DataFrame:
    """The what-if layouts of some to-date rows beside nothing else: estimates with intervals and the effective share."""
    layouts = rows[_is_what_if(rows)]
    if layouts.empty:
        return pd.DataFrame()
    frame = _wide(layouts)
    share = layouts.groupby("arm")["effective_share"].first()
    status = layouts.groupby("arm")["status"].agg(lambda s: "thin support" if "thin_support" in _flags(s) else "ok")
    frame["effective share"] = [("n/a" if pd.isna(share[a]) else f"{share[a]:.3g}") for a in frame.index]
    frame["support"] = [status[a] for a in frame.index]
    return frame


SEGMENT_NOTE = ("Each segment's lift is that segment's auctions estimated apart (their own bidder counts and values); "
                "the pooled column combines every segment by its auctions. A segment's interval is wider than the "
                "pooled one because it rests on fewer auctions; segments whose lifts differ beyond their intervals "
                "say the layouts do not rank the same everywhere (docs/method.md, 'Segments').")


def _by_segment(rows: pd.DataFrame) -> pd.Series:
    """Rows of one segment (null segment: pooled rows, and every row stored before schema version 7)."""
    return _rows_where(rows, "segment", lambda col: col.notna())


def segment_lift_table(rows: pd.DataFrame) -> pd.DataFrame:
    """Each arm's lift against control per segment and pooled, ``lift [ci_low, ci_high]``.

    Parameters
    ----------
    rows : pandas.DataFrame
        Stored experiment-to-date rows of one experiment (``segment`` null on pooled rows).

    Returns
    -------
    pandas.DataFrame
        One row per non-control arm, one column per segment (its auctions in the header), then
        ``pooled``; empty when the rows have no segment.
    """
    mine = rows[(rows["metric"] == "revenue_lift_vs_control") & ~_is_what_if(rows)]
    if not _by_segment(mine).any():
        return pd.DataFrame()
    auctions = rows[rows["metric"] == "revenue_per_auction"].groupby(rows["segment"].fillna(""))["n_auctions"].max()
    out: dict[str, dict[str, str]] = {}
    for arm, seg, est, lo, hi in zip(mine["arm"], mine["segment"], mine["estimate"], mine["ci_low"], mine["ci_high"]):
        column = "pooled" if pd.isna(seg) else str(seg)
        out.setdefault(column, {})[arm] = _interval(est, lo, hi, pct=True)
    names = sorted(c for c in out if c != "pooled") + ["pooled"]
    headers = {c: f"{c} ({int(auctions.get('' if c == 'pooled' else c, 0)):,} auctions)" for c in names}
    return pd.DataFrame(out)[names].fillna("").rename(columns=headers)


def _flags(statuses) -> set[str]:
    """Flags of stored statuses (``'ok'`` or comma-joined flags), without ``ok``."""
    return {f for s in statuses for f in str(s).split(",") if f and f != "ok"}


#: Flags a metric carries by design on every row; they need no attention and are not shown as a
#: day's status (welfare is published without an interval: docs/method.md, "Standard errors").
EXPECTED_FLAGS = {"welfare_per_auction": frozenset({"no_interval"})}
#: Flags of experiment-to-date rows that hold no number yet (estimators.window.PENDING_FLAGS).
PENDING = frozenset(PENDING_FLAGS.values()) | {"left_out", "no_days"}


def attention_flags(rows: pd.DataFrame) -> dict[str, list[str]]:
    """Flags that need attention, each with the metrics (report labels) whose rows carry it.

    Parameters
    ----------
    rows : pandas.DataFrame
        Stored estimate rows with ``metric`` and ``status``.

    Returns
    -------
    dict of str to list of str
        Sorted flags, each metric's :data:`EXPECTED_FLAGS` left out (welfare's ``no_interval``).
    """
    found: dict[str, set[str]] = {}
    for metric, status in zip(rows["metric"], rows["status"]):
        for flag in _flags([status]) - EXPECTED_FLAGS.get(metric, frozenset()):
            found.setdefault(flag, set()).add(metric)
    order = list(_LABELS)
    return {f: [_LABELS.get(m, m) for m in sorted(ms, key=lambda m: (order.index(m) if m in order else len(order), m))]
            for f, ms in sorted(found.items())}


def day_status(rows) -> str:
    """One day's (or table's) status: ``'ok'``, or the flags that need attention with their metrics.

    ``rows`` is a frame of stored rows (``metric``, ``status``): a flag on every metric's rows reads
    alone (``warning``: a data check warned for the day), one on some metrics names them
    (``few_bids (revenue / auction, lift vs control)``); a metric's expected flags are left out. A
    sequence of statuses alone (no metrics) gives every flag.
    """
    if not isinstance(rows, pd.DataFrame):
        return ", ".join(sorted(_flags(rows))) or "ok"
    every = {_LABELS.get(m, m) for m in rows["metric"]}
    parts = [flag if set(metrics) == every else f"{flag} ({', '.join(metrics)})"
             for flag, metrics in attention_flags(rows).items()]
    return ", ".join(parts) or "ok"


def _pending(rows: pd.DataFrame) -> bool:
    """Whether experiment-to-date rows hold no number yet (no day of their window used)."""
    return len(rows) > 0 and "n_days_used" in rows and bool((rows["n_days_used"] == 0).all())


def format_cumulative(table: pd.DataFrame) -> str:
    """The experiment-to-date table as text, one block per experiment."""
    blocks = []
    for exp_id, rows in table.groupby("experiment_id", sort=True):
        segments = segment_lift_table(rows)
        rows = rows[~_by_segment(rows)]
        if _pending(rows):  # warm-up (or every day left out): rows without numbers, saying why
            blocks.append(f"{exp_id}: to {pd.Timestamp(rows['ds'].max()).date()}, no day used yet (status "
                          f"{day_status(rows)})\n" + window_caption(rows))
            continue
        first, last = rows["first_ds"].min(), rows["ds"].max()
        n_auc = int(rows.loc[rows["metric"] == "revenue_per_auction", "n_auctions"].max())
        head = (f"{exp_id}: {pd.Timestamp(first).date()} .. {pd.Timestamp(last).date()}, {n_auc} auctions, "
                f"status {day_status(rows)}; intervals {interval_caption(rows[rows['metric'] != 'realized_revenue_per_auction'])}")
        lines = [head, window_caption(rows), anytime_caption(rows)]
        if _has_anytime(rows):
            lines.append(ANYTIME_NOTE)
        text = "\n".join(lines) + "\n" + _wide(rows).to_string()
        if len(segments):
            text += "\nlift vs control by segment:\n" + segments.to_string()
        blocks.append(text)
    return "\n\n".join(blocks)


def window_caption(rows: pd.DataFrame) -> str:
    """Which days the experiment-to-date rows combine and which they leave out (with the reason)."""
    if "days_used" not in rows.columns or rows.empty:
        return "days used: not recorded"
    used, left = str(rows["days_used"].iloc[0]), str(rows["days_left_out"].iloc[0] or "")
    n_used, n_left = int(rows["n_days_used"].iloc[0]), int(rows["n_days_left_out"].iloc[0])
    return (f"days used ({n_used}): {used}; left out ({n_left}): {left or 'none'}")


def _mixture_days(daily: pd.DataFrame) -> pd.DataFrame:
    mix = daily[daily["arm"] == MIXTURE_ARM].pivot(index="ds", columns="metric", values=["estimate", "std_error"])
    out = pd.DataFrame({
        "estimated": mix[("estimate", "revenue_per_auction")],
        "realized": mix[("estimate", "realized_revenue_per_auction")],
    })
    se = (mix[("std_error", "revenue_per_auction")] ** 2 + mix[("std_error", "realized_revenue_per_auction")] ** 2) ** 0.5
    out["gap"] = out["estimated"] / out["realized"] - 1.0
    # the two share the same bids, so this SE ignores a positive covariance: it overstates the
    # noise and the flag is conservative
    out["gap_se_units"] = (out["estimated"] - out["realized"]).abs() / se
    return out


def _colours(daily: pd.DataFrame) -> dict[str, str]:
    """One colour per arm, the same in every plot of an experiment."""
    arms = [a for a in dict.fromkeys(daily["arm"]) if a != MIXTURE_ARM]
    return {a: f"C{k}" for k, a in enumerate(arms)}


def _plot_revenue(daily: pd.DataFrame, exp_id: str, target: Path) -> str:
    """Plot revenue per auction by day to ``target``; return the title (it names the intervals)."""
    fig, ax = plt.subplots(figsize=(9, 4.2))
    rev = daily[(daily["metric"] == "revenue_per_auction") & (daily["arm"] != MIXTURE_ARM)]
    naive = daily[(daily["metric"] == "realized_revenue_per_auction") & (daily["arm"] != MIXTURE_ARM)]
    colours = _colours(daily)
    for arm, rows in rev.groupby("arm", sort=False):
        colour = colours[arm]
        x = pd.to_datetime(rows["ds"])
        ax.plot(x, rows["estimate"], color=colour, lw=2, marker="o", ms=3, label=f"{arm}: if run everywhere")
        ax.fill_between(x, rows["ci_low"], rows["ci_high"], color=colour, alpha=0.18, lw=0)
        raw = naive[naive["arm"] == arm]
        ax.plot(pd.to_datetime(raw["ds"]), raw["estimate"], color=colour, lw=1.3, ls="--",
                label=f"{arm}: realized per-arm average")
    title = f"{exp_id}: revenue per auction by day\n(bands: {interval_caption(rev)} intervals)"
    ax.set_title(title, fontsize=10)
    ax.set_ylabel("revenue per auction")
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%m-%d"))
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7.5, ncol=2, loc="best")
    fig.tight_layout()
    fig.savefig(target, dpi=110)
    plt.close(fig)
    return title


def _plot_lift(daily: pd.DataFrame, to_date: pd.DataFrame, exp_id: str, target: Path) -> str:
    """Plot the lift by day and to date to ``target``; return the title (it names the intervals)."""
    fig, ax = plt.subplots(figsize=(9, 4.2))
    day = daily[daily["metric"] == "revenue_lift_vs_control"]
    cum = to_date[to_date["metric"] == "revenue_lift_vs_control"]
    if "n_days_used" in cum:
        cum = cum[cum["n_days_used"] > 0]  # a warm-up day's rows hold no number to plot
    colours = _colours(daily)
    for arm, rows in day.groupby("arm", sort=False):
        colour = colours[arm]
        x = pd.to_datetime(rows["ds"])
        ax.errorbar(x, rows["estimate"], yerr=[rows["estimate"] - rows["ci_low"], rows["ci_high"] - rows["estimate"]],
                    fmt="o", color=colour, ms=3, lw=0.8, capsize=2, alpha=0.6, label=f"{arm}: that day")
        c = cum[cum["arm"] == arm]
        xc = pd.to_datetime(c["ds"])
        ax.plot(xc, c["estimate"], color=colour, lw=2, label=f"{arm}: experiment to date")
        ax.fill_between(xc, c["ci_low"], c["ci_high"], color=colour, alpha=0.18, lw=0,
                        label=f"{arm}: to date, fixed interval (one planned look)")
        if _has_anytime(c):
            ax.fill_between(xc, c["anytime_low"], c["anytime_high"], facecolor="none", edgecolor=colour, hatch="///",
                            lw=0.8, ls="--", label=f"{arm}: to date, anytime-valid (act on this one)")
    ax.axhline(0.0, color="0.3", lw=0.8)
    ax.yaxis.set_major_formatter(matplotlib.ticker.PercentFormatter(1.0))
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%m-%d"))
    title = f"{exp_id}: revenue lift over control\n(that day: {interval_caption(day)}; to date: {interval_caption(cum)})"
    if _has_anytime(cum):
        title += "\nlooking daily? act on the hatched anytime-valid band, not the fixed one"
    ax.set_title(title, fontsize=10)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7.5, ncol=2, loc="best")
    fig.tight_layout()
    fig.savefig(target, dpi=110)
    plt.close(fig)
    return title


CANDIDATES_NOTE = ("Candidates for the next experiment, ranked by their what-if revenue per auction (the same caution "
                   "as the layouts that did not run) and by the traffic share each would need, run as an arm beside "
                   "control, to settle its lift to the stated half width in the stated days. The share reads the "
                   "lift's spread off the bids that ran in place of the bids bidders would place against that "
                   "experiment's mixture (docs/method.md, 'The next experiment: the share a candidate needs').")
_SHARE_TEXT = {"any_share": "any (even {:g})", "out_of_reach": "none reaches it", "thin_support": "thin support: none"}


def candidate_table(ranking) -> pd.DataFrame:
    """A :class:`~counterbid.estimators.candidates.CandidateRanking` as report cells, best revenue first."""
    t = ranking.table
    if t.empty:
        return pd.DataFrame()
    rows = {}
    for _, r in t.iterrows():
        share = f"{r['needed_share']:.3g}" if r["status"] == "ok" else \
            _SHARE_TEXT[r["status"]].format(r["needed_share"])
        rows[r["layout"]] = {
            "revenue rank": "" if pd.isna(r["revenue_rank"]) else int(r["revenue_rank"]),
            "revenue / auction": _interval(r["revenue_per_auction"], r["revenue_low"], r["revenue_high"]),
            "lift vs control": _interval(r["lift_vs_control"], r["lift_low"], r["lift_high"], pct=True),
            "effective share": "n/a" if pd.isna(r["effective_share"]) else f"{r['effective_share']:.3g}",
            "share needed": share,
            "share rank": "" if pd.isna(r["share_rank"]) else int(r["share_rank"]),
            "from": r["origin"],
        }
    return pd.DataFrame.from_dict(rows, orient="index")


def _candidates_html(ranking) -> str:
    frame = candidate_table(ranking) if ranking is not None else pd.DataFrame()
    if frame.empty:
        return ""
    return (f"<h3>Candidates for the next experiment</h3><p>Lift half width wanted: "
            f"&plusmn;{ranking.target_half_width:.2%} in {ranking.days} days of {ranking.auctions_per_day:,} auctions, "
            f"beside {html.escape(ranking.control_arm)}; {format_level(ranking.confidence_level)} intervals clustered by "
            f"auction, from {ranking.n_auctions:,} auctions.</p>{_table_html(frame)}"
            f"<p class='note'>{html.escape(CANDIDATES_NOTE)}</p>")


def _table_html(frame: pd.DataFrame, *, index=True) -> str:
    return frame.to_html(index=index, escape=True, border=0, classes="grid", na_rep="")


def write_report(hook: ResultsHook, out_dir: str | Path, *, title: str = "Auction experiments: per-arm estimates",
                 candidates: Mapping[str, Any] | None = None) -> Path:
    """Write ``out_dir/index.html`` and its PNG plots from the results database.

    Parameters
    ----------
    hook : ResultsHook
    out_dir : path
        Created if missing; files are replaced.
    title : str
    candidates : mapping, optional
        Experiment id to its :class:`~counterbid.estimators.candidates.CandidateRanking`
        (:func:`~counterbid.estimators.candidates.rank_candidates`): the experiment's section then
        ranks those layouts for the next experiment. Experiments without one show no such section.

    Returns
    -------
    Path
        The HTML file.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    # the table exists in every current schema (migration step 1); show the column when it holds outcomes
    has_checks = hook.table_exists("data_checks") and bool(hook.fetch_df("report_has_checks")["present"].iloc[0])
    cumulative = cumulative_table(hook)
    sections = []
    auctions_run = []
    for exp_id in hook.fetch_df("report_experiments")["experiment_id"]:
        daily = hook.fetch_df("report_daily_estimates", {"experiment_id": exp_id})
        daily = daily[~_is_what_if(daily) & ~_by_segment(daily)]  # the arms that ran, pooled; the rest has its own view
        auctions_run.append(f"{exp_id}: {auction_caption(daily)}")
        to_date = hook.fetch_df("report_to_date_estimates", {"experiment_id": exp_id})
        to_date = to_date[~_by_segment(to_date)]
        weights = hook.fetch_df("report_position_weights", {"experiment_id": exp_id})
        rev_png, lift_png = f"{exp_id}_revenue.png", f"{exp_id}_lift.png"
        _plot_revenue(daily, exp_id, out / rev_png)
        has_lift = (daily["metric"] == "revenue_lift_vs_control").any()
        if has_lift:
            _plot_lift(daily, to_date, exp_id, out / lift_png)
        cum = cumulative[cumulative["experiment_id"] == exp_id]
        segments = segment_lift_table(cum)
        cum = cum[~_by_segment(cum)]
        layouts = what_if_table(cum)
        cum = cum[~_is_what_if(cum)]
        days = _mixture_days(daily)
        per_day = pd.DataFrame(index=days.index)
        per_day["estimate status"] = pd.Series({d: day_status(g) for d, g in daily.groupby("ds")})
        model_rows = daily[daily["metric"] != "realized_revenue_per_auction"]
        per_day["intervals"] = pd.Series({d: interval_caption(g) for d, g in model_rows.groupby("ds")})
        if has_checks:
            checks = hook.fetch_df("report_day_check_status", {"experiment_id": exp_id}).set_index("ds")
            per_day["data checks"] = [
                f"{checks.loc[d, 'worst_status']} ({int(checks.loc[d, 'n_failed'])}/{int(checks.loc[d, 'n_checks'])} failed"
                + (f"; {int(checks.loc[d, 'n_on_sample'])} on one shard)" if checks.loc[d, "n_on_sample"] else ")")
                if d in checks.index else "not run" for d in per_day.index]
        per_day["mixture: estimated"] = days["estimated"].map("{:.4f}".format)
        per_day["mixture: realized"] = days["realized"].map("{:.4f}".format)
        per_day["gap"] = days["gap"].map("{:+.2%}".format)
        flagged = days.index[days["gap_se_units"] > MIXTURE_GAP_SE]
        per_day["mixture gap"] = ["beyond 3 SE" if d in flagged else "within 3 SE" for d in days.index]
        per_day.index = [pd.Timestamp(d).date().isoformat() for d in per_day.index]
        notes = []
        if len(flagged):
            notes.append(
                f"On {len(flagged)} day(s) ({', '.join(pd.Timestamp(d).date().isoformat() for d in flagged)}) the mixture's "
                "estimated revenue disagrees with its realized revenue by more than 3 standard errors: bidders had "
                "probably not adapted to the experiment, so those days' estimates (and the experiment-to-date numbers, "
                "when the window includes them) violate the equilibrium assumption.")
        warn_days = [pd.Timestamp(d).date().isoformat() for d, g in daily.groupby("ds") if "warning" in _flags(g["status"])]
        if warn_days:
            notes.append(f"Data checks raised warnings on {', '.join(warn_days)}; those estimates carry the flag 'warning'.")
        flagged_days = []
        for d, g in daily.groupby("ds"):
            own = {f: m for f, m in attention_flags(g).items() if f != "warning"}
            if own:
                flagged_days.append(f"{pd.Timestamp(d).date().isoformat()}: "
                                    + "; ".join(f"{f} on {', '.join(m)}" for f, m in own.items()))
        if flagged_days:
            notes.append(f"The estimator flagged rows that need attention ({' | '.join(flagged_days)}); the estimate "
                         "status column lists each day's flags by metric.")
        if has_checks and "data checks" in per_day and per_day["data checks"].str.startswith("error").any():
            notes.append("Days whose data checks failed with an error have no estimates.")
        if has_checks and "data checks" in per_day and per_day["data checks"].str.contains("on one shard").any():
            notes.append("On days split into several shards the distribution checks (monotone values, shading, drift) "
                         "ran on one shard alone (shard 0, or the first with an auction of two bids or more), a hash "
                         "sample of whole auctions; the counting checks counted every "
                         "auction of the day.")
        weights_note = ""
        if not weights.empty:
            src = weights.groupby("arm")["source"].first()
            wl = weights.groupby("arm")["weight"].apply(lambda w: ", ".join(f"{x:.3g}" for x in w))
            weights_note = "<p class='small'>Position weights (top first): " + "; ".join(
                f"{html.escape(a)} [{html.escape(wl[a])}] ({html.escape(src[a])})" for a in wl.index) + "</p>"
        window_line = window_caption(cum) if len(cum) else ""
        pending = _pending(cum)
        if pending:  # the latest to-date rows hold no number yet: say why, show no table of n/a
            segments = segments.iloc[0:0]
            cum_text = (f"<p>Experiment to date, to {pd.Timestamp(cum['ds'].max()).date()}: no day used yet "
                        f"(status {html.escape(day_status(cum))}); the numbers start with the first day the window "
                        f"keeps.</p>")
            cum = cum.iloc[0:0]
        first, last = (pd.Timestamp(cum["first_ds"].min()).date(), pd.Timestamp(cum["ds"].max()).date()) if len(cum) else ("", "")
        n_auc = int(cum.loc[cum["metric"] == "revenue_per_auction", "n_auctions"].max()) if len(cum) else 0
        if not pending:
            cum_text = (f"<p>Experiment to date, {first} to {last}: {n_auc:,} auctions, each day estimated alone and the "
                        "days combined by\ntheir auctions (the auction-weighted average of each day's counterfactual).</p>")
        cum_model = cum[cum["metric"] != "realized_revenue_per_auction"]
        used = list(dict.fromkeys(cum_model["cluster"]))
        speaks_for = POPULATION[used[0]] if len(used) == 1 else "; ".join(f"by {cl}, {POPULATION[cl]}" for cl in used)
        sections.append(f"""
<section>
<h2>{html.escape(exp_id)}</h2>
{cum_text}
<p><strong>{html.escape(window_line)}</strong>. By default a day whose warm-up or drift
check failed is left out, as are the spec's burn-in and excluded days.</p>
<p>
Intervals: {html.escape(interval_caption(cum_model)) if len(cum) else "none"}{html.escape(f" (they speak for {speaks_for})") if speaks_for else ""};
the realized per-arm average's are always clustered by auction.</p>
{_table_html(_wide(cum)) if len(cum) else "<p>No experiment-to-date rows.</p>"}
{f"<p>{html.escape(anytime_caption(cum))}. <strong>{html.escape(ANYTIME_NOTE)}</strong></p>" if _has_anytime(cum) else ""}
{weights_note}
{f"<h3>Lift by segment</h3>{_table_html(segments)}<p class='note'>{html.escape(SEGMENT_NOTE)}</p>" if len(segments) else ""}
{f"<h3>Layouts that did not run</h3>{_table_html(layouts)}<p class='note'>{html.escape(WHAT_IF_NOTE)}</p>" if len(layouts) else ""}
{_candidates_html((candidates or {}).get(exp_id))}
{"".join(f"<p class='note'>{html.escape(n)}</p>" for n in notes)}
<img src="{html.escape(rev_png)}" alt="revenue per auction by day, {html.escape(exp_id)}">
{f'<img src="{html.escape(lift_png)}" alt="lift by day, {html.escape(exp_id)}">' if has_lift else ""}
<h3>By day</h3>
{_table_html(per_day)}
<p class="small">The mixture gap compares the estimated revenue of the mix that ran with its realized revenue.
A gap beyond 3 standard errors is evidence that bidders had not adapted; a gap within them is not proof that
they had (bids answering one arm only can still match). {"The data-check column gives each day's worst check outcome." if has_checks else "No data-check outcomes are stored for this database, so nothing here tests the equilibrium assumption directly."}</p>
</section>""")
    generated = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    page = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>
<style>
body {{ font-family: system-ui, sans-serif; max-width: 1000px; margin: 2em auto; color: #222; }}
table.grid {{ border-collapse: collapse; font-size: 0.85em; margin: 0.6em 0; }}
table.grid th, table.grid td {{ padding: 0.25em 0.6em; border-bottom: 1px solid #ddd; text-align: right; }}
.rests {{ background: #f4f4f0; padding: 0.6em 1em; border-left: 4px solid #888; }}
.note {{ background: #fff4e0; padding: 0.4em 0.8em; border-left: 4px solid #d08000; }}
.small {{ font-size: 0.85em; color: #555; }}
img {{ max-width: 100%; display: block; margin: 0.6em 0; }}
</style></head><body>
<h1>{html.escape(title)}</h1>
<p class="small">Generated {generated} from {html.escape(str(hook.where))}.</p>
<div class="rests"><strong>These numbers rest on:</strong><ul>{"".join(f"<li>{html.escape(a)}</li>" for a in ASSUMPTIONS)}</ul>
<p>The auction that ran (payment rule, floor per click): {html.escape("; ".join(auctions_run)) or "no experiments"}.</p>
Counterfactual rows answer "what would this arm earn per auction if it ran in every auction and bidders had
adapted to it". The realized per-arm average is each arm's revenue over its own auctions: it is biased because
bidders bid against the mixture, and is shown only for comparison. Every interval's level and clustering are printed
beside it: clustered by bidder, an interval speaks for {POPULATION["bidder"]}; clustered by auction, for
{POPULATION["auction"]}. The realized per-arm average's intervals are always clustered by auction.</div>
{"".join(sections)}
</body></html>
"""
    target = out / "index.html"
    tmp = target.with_name(f".index.{os.getpid()}.tmp")
    tmp.write_text(page, encoding="utf-8")
    os.replace(tmp, target)
    return target
