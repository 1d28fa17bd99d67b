"""Experiment specification: arms, traffic shares, position weights.

A spec file (YAML) holds one or more experiments::

    experiments:
      - id: homepage-slots
        payment_rule: gsp          # optional: first_price (default), gsp or vcg -- the rule that ran
        control_arm: control
        start: 2026-03-01          # optional: first day the experiment runs
        end: 2026-03-28            # optional: last day (inclusive)
        floor: 0.05                # optional: floor per click, shared by every arm (effective-bid units)
        max_bid: 40.0              # optional: the largest bid the marketplace accepts (bid units)
        arms:
          - {name: control, share: 0.9, position_weights: [0.31, 0.17, 0.06, 0.02]}
          - {name: wide,    share: 0.1, position_weights: [0.29, 0.22, 0.15, 0.02]}
        what_if:                   # optional: layouts that did not run, estimated from the same bids
          - {name: steep-top, position_weights: [0.40, 0.15, 0.05]}
        checks: {}                 # optional: thresholds for the data checks
        burn_in_days: 2            # optional: leave the first 2 days out of the experiment-to-date numbers
        exclude_days: [2026-03-09] # optional: days left out of the experiment-to-date numbers
        segments: [category]       # optional: bid-log columns constant within an auction; estimated apart
        scale_covariates: [demand_index]  # optional: numeric auction-level columns values scale with

``payment_rule`` names the per-click prices of the auctions that ran (pay-your-bid, next-lower
bid, or truthful VCG prices); it decides how bids map back to values. ``floor`` is one number for
the whole experiment: bids (effective bids ``bid x quality`` when the log has a ``quality``
column) below it are ineligible and logged with a null position. Floors that differ by arm are
not modelled, and the spec has no per-arm ``floor`` key (refused as an unknown key).

``max_bid`` is the largest bid the marketplace accepts (the ``bid`` column, before any quality
factor). A logged bid above it cannot have been placed, so the log is wrong (a unit slip, a
corrupt row): :func:`~counterbid.estimators.prepare_bids` refuses it with one line naming the row
and the value, and no number is estimated from that input.

``burn_in_days`` and ``exclude_days`` shape the analysis window of the experiment-to-date numbers:
the first ``burn_in_days`` days from ``start`` and every listed day are left out, besides the days
whose warm-up or drift check failed (the pipeline's default).

``segments`` names columns of the bid log (string, integer or boolean) that are constant within an
auction: every (day, number of bidders, segment) is estimated as a stratum of its own, so auctions
whose values come from different distributions are not pooled into one inversion.

``what_if`` lists layouts that did not run: each gets revenue and welfare per auction and its lift
against control from the mixture's bids (``docs/method.md``, "Layouts that did not run"). Names must
differ from the arms' and from each other; weights are validated as the arms' and cannot be
``measured`` (a layout that never ran has no clicks to measure).

``scale_covariates`` names numeric bid-log columns, constant within an auction, with which every
value of the auction scales (values ``= exp(gamma . x) x`` a draw from one distribution): the
estimate runs on homogenised bids and is scaled back (``docs/method.md``, "Scale covariates"). A
floor does not scale with them, so a floor with scale covariates is refused.

``position_weights`` may also be the string ``measured``: the pipeline then fills the weights
from the click log before estimating. A key the spec does not know, at any level (the top, an
experiment, an arm, the ``checks`` block and its settings), is refused with a message naming
the key, the file, the experiment id and the arm.
"""

from __future__ import annotations

import datetime as _dt
import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import yaml

from .bid_contract import BID_CONTRACT
from .check_settings import check_config
from .days import parse_day
from .errors import InputError
from .payment_rules import PAYMENT_RULES as _PAYMENT_RULES

__all__ = [
    "Arm",
    "WhatIf",
    "Experiment",
    "PAYMENT_RULES",
    "SHARE_TOLERANCE",
    "load_experiment",
    "load_experiments",
    "parse_day",
    "parse_experiments",
    "parse_what_ifs",
]

#: Payment rules the estimator implements (the one list lives with their weights).
PAYMENT_RULES = _PAYMENT_RULES
#: Shares must sum to one within this tolerance.
SHARE_TOLERANCE = 1e-6
#: Arm names starting with an underscore are reserved for derived rows (``_mixture``).
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,127}$")
#: Keys a spec may hold at each level; anything else is refused (a typo must not be ignored).
DOCUMENT_KEYS = frozenset({"experiments", "description"})
EXPERIMENT_KEYS = frozenset({"id", "payment_rule", "control_arm", "arms", "start", "end", "floor", "checks", "description",
                             "burn_in_days", "exclude_days", "max_bid", "segments", "what_if",
                             "scale_covariates"})
ARM_KEYS = frozenset({"name", "share", "position_weights", "description"})
WHAT_IF_KEYS = frozenset({"name", "position_weights", "description"})


def _refuse_unknown(raw: Mapping, known: frozenset, where: str) -> None:
    """Raise naming the first unknown key of ``raw`` (sorted) and where it sits."""
    extra = sorted((str(k) for k in raw if k not in known))
    if extra:
        raise InputError(f"{where}: unknown key {extra[0]!r} (known: {', '.join(sorted(known))})")


@dataclass(frozen=True)
class Arm:
    """One arm of an experiment.

    Attributes
    ----------
    name : str
        Arm name as it appears in the bids' ``arm`` column.
    share : float
        Designed share of auctions that run this arm, in (0, 1].
    position_weights : tuple of float or None
        Click weight of each position, top first, non-increasing and non-negative; positions
        past the end weigh 0. ``None`` when ``measured`` is true and not yet filled.
    measured : bool
        True when the spec asks for weights measured from the click log.
    """

    name: str
    share: float
    position_weights: tuple[float, ...] | None
    measured: bool = False

    def weights_for(self, n_bidders: int) -> tuple[float, ...]:
        """Position weights padded with zeros (or cut) to ``n_bidders`` positions."""
        if self.position_weights is None:
            raise InputError(f"arm {self.name!r}: position weights are 'measured' and were not filled")
        w = tuple(self.position_weights[:n_bidders])
        return w + (0.0,) * (n_bidders - len(w))


@dataclass(frozen=True)
class WhatIf:
    """A layout that did not run: estimated from the bids placed against the experiment's mixture.

    Attributes
    ----------
    name : str
        Label of its result rows (distinct from every arm's name).
    position_weights : tuple of float
        Click weight of each position, top first, non-increasing and non-negative.
    """

    name: str
    position_weights: tuple[float, ...]

    def weights_for(self, n_bidders: int) -> tuple[float, ...]:
        """Position weights padded with zeros (or cut) to ``n_bidders`` positions."""
        w = tuple(self.position_weights[:n_bidders])
        return w + (0.0,) * (n_bidders - len(w))


@dataclass(frozen=True)
class Experiment:
    """An auction-rule experiment: which arms run in which share of auctions.

    Attributes
    ----------
    id : str
    payment_rule : str
        Per-click prices of the auctions that ran: ``first_price`` (pay your bid), ``gsp`` (the
        next-lower eligible bid, or the floor) or ``vcg`` (truthful prices). The arms' own revenue
        does not depend on it (revenue equivalence); how bids map to values does.
    control_arm : str
    arms : tuple of Arm
    start, end : datetime.date or None
        First and last day (inclusive) the experiment runs; ``None`` for open-ended.
    floor : float or None
        Floor per click shared by every arm, in bid units (effective-bid units ``bid x quality``
        when the log has quality factors). Bids below it are ineligible and logged unshown; the
        estimator models it (``None`` or 0: no floor).
    checks : dict
        Threshold overrides for the data checks, passed through unchanged.
    burn_in_days : int
        Days from ``start`` left out of the experiment-to-date numbers (0: none).
    exclude_days : tuple of datetime.date
        Days left out of the experiment-to-date numbers, sorted.
    max_bid : float or None
        The largest bid the marketplace accepts, in the units of the ``bid`` column (before
        quality); a logged bid above it is refused as bad input. ``None``: no bound.
    segments : tuple of str
        Bid-log columns whose values (constant within an auction) split the auctions into
        segments estimated apart (``()``: not segmented).
    what_if : tuple of WhatIf
        Layouts that did not run, estimated from the same bids (no share: not in the mixture).
    scale_covariates : tuple of str
        Numeric bid-log columns, constant within an auction, that scale every value of the
        auction (``()``: none; see :mod:`.scale_covariates`).
    """

    id: str
    payment_rule: str
    control_arm: str
    arms: tuple[Arm, ...]
    start: _dt.date | None = None
    end: _dt.date | None = None
    floor: float | None = None
    checks: Mapping[str, Any] = field(default_factory=dict)
    burn_in_days: int = 0
    exclude_days: tuple[_dt.date, ...] = ()
    max_bid: float | None = None
    segments: tuple[str, ...] = ()
    what_if: tuple[WhatIf, ...] = ()
    scale_covariates: tuple[str, ...] = ()

    @property
    def arm_names(self) -> tuple[str, ...]:
        return tuple(a.name for a in self.arms)

    @property
    def target_names(self) -> tuple[str, ...]:
        """Every layout estimated: the arms, then the what-if layouts."""
        return self.arm_names + tuple(w.name for w in self.what_if)

    @property
    def targets(self) -> tuple[Arm | WhatIf, ...]:
        """The arms, then the what-if layouts (each has ``name`` and ``weights_for``)."""
        return tuple(self.arms) + tuple(self.what_if)

    @property
    def shares(self) -> tuple[float, ...]:
        return tuple(a.share for a in self.arms)

    @property
    def auction_columns(self) -> tuple[str, ...]:
        """The log's auction-level columns the spec names: segment columns, then scale covariates."""
        return tuple(self.segments) + tuple(self.scale_covariates)

    def arm(self, name: str) -> Arm:
        for a in self.arms:
            if a.name == name:
                return a
        raise InputError(f"experiment {self.id!r}: unknown arm {name!r}")

    def is_active(self, day: _dt.date) -> bool:
        """Whether the experiment runs on ``day`` (start and end inclusive)."""
        return (self.start is None or self.start <= day) and (self.end is None or day <= self.end)

    def with_position_weights(self, weights: Mapping[str, Sequence[float]]) -> "Experiment":
        """A copy with the given arms' position weights filled (e.g. measured from clicks)."""
        arms = []
        for a in self.arms:
            if a.name in weights:
                w = _weights(weights[a.name], f"experiment {self.id!r} arm {a.name!r} position_weights")
                arms.append(replace(a, position_weights=w))
            else:
                arms.append(a)
        return replace(self, arms=tuple(arms))


def _weights(raw: Any, where: str) -> tuple[float, ...]:
    if isinstance(raw, (str, bytes)) or not isinstance(raw, Sequence) or len(raw) == 0:
        raise InputError(f"{where}: must be a non-empty list of numbers or 'measured'; got {raw!r}")
    out = []
    for k, v in enumerate(raw, start=1):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
            raise InputError(f"{where}: position {k} must be a finite number >= 0; got {v!r}")
        out.append(float(v))
    for k in range(1, len(out)):
        if out[k] > out[k - 1]:
            raise InputError(
                f"{where}: weights must be non-increasing; position {k + 1} ({out[k]}) "
                f"exceeds position {k} ({out[k - 1]})"
            )
    if out[0] <= 0:
        raise InputError(f"{where}: the top position must have a positive weight")
    return tuple(out)


def _experiment(raw: Any, where: str) -> Experiment:
    if not isinstance(raw, Mapping):
        raise InputError(f"{where}: must be a mapping with keys id, control_arm, arms")
    exp_id = raw.get("id")
    valid_id = isinstance(exp_id, (str, int)) and not isinstance(exp_id, bool) and str(exp_id) != ""
    _refuse_unknown(raw, EXPERIMENT_KEYS, f"{where} (id {str(exp_id)!r})" if valid_id else where)
    if not valid_id:
        raise InputError(f"{where}: 'id' must be a non-empty string")
    exp_id = str(exp_id)
    if not _NAME.match(exp_id):  # ids name folders, lake partitions and database rows: arm names' alphabet
        raise InputError(f"{where}: experiment id {exp_id!r} must be 1-128 characters of letters, digits, '_', '.', "
                         "'-' not starting with '_', '.' or '-'")
    where = f"{where} (id {exp_id!r})"
    rule = raw.get("payment_rule", "first_price")
    if not isinstance(rule, str) or rule not in PAYMENT_RULES:
        raise InputError(f"{where}: unknown payment_rule {rule!r} (supported: {', '.join(PAYMENT_RULES)})")
    arms_raw = raw.get("arms")
    if not isinstance(arms_raw, Sequence) or isinstance(arms_raw, (str, bytes)) or len(arms_raw) < 1:
        raise InputError(f"{where}: 'arms' must be a non-empty list")
    arms: list[Arm] = []
    for i, a in enumerate(arms_raw):
        aw = f"{where} arms[{i}]"
        if not isinstance(a, Mapping):
            raise InputError(f"{aw}: must be a mapping with keys name, share, position_weights")
        name = a.get("name")
        if "floor" in a:
            raise InputError(f"{aw} ({name}): arms with different floors are not modelled (bids would bunch at "
                             "each arm's floor); set one 'floor' for the whole experiment")
        _refuse_unknown(a, ARM_KEYS, f"{aw} ({name})" if isinstance(name, str) else aw)
        name, weights = _layout(a, aw)
        if name in {x.name for x in arms}:
            raise InputError(f"{aw}: duplicate arm name {name!r}")
        share = a.get("share")
        if isinstance(share, bool) or not isinstance(share, (int, float)) or not (0 < share <= 1):
            raise InputError(f"{aw} ({name}): 'share' must be a number in (0, 1]; got {share!r}")
        arms.append(Arm(name, float(share), weights, measured=weights is None))
    total = math.fsum(a.share for a in arms)
    if abs(total - 1.0) > SHARE_TOLERANCE:
        raise InputError(f"{where}: arm shares must sum to 1 (within {SHARE_TOLERANCE:g}); they sum to {total:.9g}")
    control = raw.get("control_arm", arms[0].name)
    if control not in {a.name for a in arms}:
        raise InputError(f"{where}: control_arm {control!r} is not one of the arms ({', '.join(a.name for a in arms)})")
    floor = raw.get("floor")
    if floor is not None and (isinstance(floor, bool) or not isinstance(floor, (int, float)) or not math.isfinite(floor) or floor < 0):
        raise InputError(f"{where}: 'floor' must be a finite number >= 0; got {floor!r}")
    max_bid = _max_bid(raw.get("max_bid"), floor, where)
    start = None if raw.get("start") is None else parse_day(raw["start"], what=f"{where} start")
    end = None if raw.get("end") is None else parse_day(raw["end"], what=f"{where} end")
    if start and end and end < start:
        raise InputError(f"{where}: end {end} is before start {start}")
    checks = raw.get("checks") or {}
    if not isinstance(checks, Mapping):
        raise InputError(f"{where}: 'checks' must be a mapping")
    check_config(checks, source=f"{where} checks")  # unknown check or setting, or a bad value: refused now
    burn_in = raw.get("burn_in_days", 0)
    if isinstance(burn_in, bool) or not isinstance(burn_in, int) or burn_in < 0:
        raise InputError(f"{where}: 'burn_in_days' must be a whole number >= 0; got {burn_in!r}")
    excluded_raw = raw.get("exclude_days") or []
    if isinstance(excluded_raw, (str, bytes)) or not isinstance(excluded_raw, Sequence):
        raise InputError(f"{where}: 'exclude_days' must be a list of dates YYYY-MM-DD; got {excluded_raw!r}")
    excluded = tuple(sorted({parse_day(d, what=f"{where} exclude_days[{i}]") for i, d in enumerate(excluded_raw)}))
    segments = _segments(raw.get("segments"), where)
    what_if = _what_ifs(raw.get("what_if"), {a.name for a in arms}, where)
    covariates = _scale_covariates(raw.get("scale_covariates"), floor, where)
    return Experiment(
        id=exp_id,
        payment_rule=rule,
        control_arm=control,
        arms=tuple(arms),
        start=start,
        end=end,
        floor=None if floor is None else float(floor),
        checks=dict(checks),
        burn_in_days=int(burn_in),
        exclude_days=excluded,
        max_bid=max_bid,
        segments=segments,
        what_if=what_if,
        scale_covariates=covariates,
    )


def _scale_covariates(raw: Any, floor: Any, where: str) -> tuple[str, ...]:
    """The ``scale_covariates`` list: distinct column names outside the contract; refused beside a floor."""
    if raw is None:
        return ()
    if isinstance(raw, (str, bytes)) or not isinstance(raw, Sequence):
        raise InputError(f"{where}: 'scale_covariates' must be a list of bid-log column names; got {raw!r}")
    out: list[str] = []
    for i, name in enumerate(raw):
        if not isinstance(name, str) or not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]{0,62}", name):
            raise InputError(f"{where}: scale_covariates[{i}] must be a column name (letters, digits, '_'); got {name!r}")
        if name in BID_CONTRACT or name in out:
            why = "is a column of the bids data contract" if name in BID_CONTRACT else "is listed twice"
            raise InputError(f"{where}: scale_covariates[{i}] {name!r} {why}")
        out.append(name)
    if out and floor:
        raise InputError(f"{where}: a floor ({floor!r}) with scale_covariates is not modelled: the floor does not "
                         "scale with the covariates, so bids are not homogeneous in them; drop one of the two")
    return tuple(out)


def _max_bid(value: Any, floor: Any, where: str) -> float | None:
    """The spec's ``max_bid``: ``None``, or a finite number > 0 and not below the floor."""
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0:
        raise InputError(f"{where}: 'max_bid' must be a finite number > 0; got {value!r}")
    if floor is not None and value < floor:
        raise InputError(f"{where}: 'max_bid' {value!r} lies below the floor {floor!r}")
    return float(value)


def _segments(raw: Any, where: str) -> tuple[str, ...]:
    """The ``segments`` list: distinct column names, none of the contract's own columns."""
    if raw is None:
        return ()
    if isinstance(raw, (str, bytes)) or not isinstance(raw, Sequence):
        raise InputError(f"{where}: 'segments' must be a list of bid-log column names; got {raw!r}")
    out: list[str] = []
    for i, name in enumerate(raw):
        if not isinstance(name, str) or not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]{0,62}", name):
            raise InputError(f"{where}: segments[{i}] must be a column name (letters, digits, '_'); got {name!r}")
        if name in BID_CONTRACT:
            raise InputError(f"{where}: segments[{i}] {name!r} is a column of the bids data contract, not a segment")
        if name in out:
            raise InputError(f"{where}: segments[{i}] {name!r} is listed twice")
        out.append(name)
    return tuple(out)


def _what_ifs(raw: Any, arm_names: set[str], where: str) -> tuple[WhatIf, ...]:
    """The ``what_if`` list: names as the arms' (distinct from them), weights as the arms' but never measured."""
    if raw is None:
        return ()
    if not isinstance(raw, Sequence) or isinstance(raw, (str, bytes)):
        raise InputError(f"{where}: 'what_if' must be a list of {{name, position_weights}}")
    out: list[WhatIf] = []
    for i, item in enumerate(raw):
        ww = f"{where} what_if[{i}]"
        if not isinstance(item, Mapping):
            raise InputError(f"{ww}: must be a mapping with keys name, position_weights")
        name = item.get("name")
        if "share" in item:
            raise InputError(f"{ww} ({name}): a what-if layout did not run and has no 'share'; "
                             "list it under 'arms' if it ran")
        _refuse_unknown(item, WHAT_IF_KEYS, f"{ww} ({name})" if isinstance(name, str) else ww)
        name, weights = _layout(item, ww)
        if name in arm_names:
            raise InputError(f"{ww}: name {name!r} is already an arm's; a what-if layout needs its own name")
        if name in {w.name for w in out}:
            raise InputError(f"{ww}: duplicate what-if name {name!r}")
        if weights is None:
            raise InputError(f"{ww} ({name}): position_weights cannot be 'measured' for a layout that did not run "
                             "(it has no clicks); give the weights as numbers")
        out.append(WhatIf(name, weights))
    return tuple(out)


def _layout(raw: Mapping, where: str) -> tuple[str, tuple[float, ...] | None]:
    """A layout's validated ``name`` and ``position_weights`` (``None`` for ``measured``): arms' and what-ifs'."""
    name = raw.get("name")
    if not isinstance(name, str) or not _NAME.match(name):
        raise InputError(f"{where}: 'name' must be 1-128 characters of letters, digits, '_', '.', '-' "
                         f"not starting with '_' or '-'; got {name!r}")
    pw = raw.get("position_weights")
    if isinstance(pw, str) and pw == "measured":
        return name, None
    return name, _weights(pw, f"{where} ({name}) position_weights")


def parse_what_ifs(raw: Any, arm_names: Sequence[str] = (), *, source: str = "layouts") -> tuple[WhatIf, ...]:
    """Validate a list of ``{name, position_weights}`` layouts as a spec's ``what_if`` list.

    Parameters
    ----------
    raw : list of mapping
        As the ``what_if`` key of an experiment (e.g. a candidates file).
    arm_names : sequence of str
        Names the layouts must not take (the experiment's arms).
    source : str
        Where the list came from, for error messages.

    Returns
    -------
    tuple of WhatIf
    """
    return _what_ifs(raw, set(arm_names), source)


def parse_experiments(document: Any, *, source: str = "spec") -> dict[str, Experiment]:
    """Validate a parsed spec document and return its experiments keyed by id.

    Parameters
    ----------
    document : mapping
        The parsed YAML: ``{"experiments": [...]}``.
    source : str
        Name used in error messages (usually the file path).

    Returns
    -------
    dict of str to Experiment
    """
    if not isinstance(document, Mapping) or "experiments" not in document:
        raise InputError(f"{source}: top-level key 'experiments' is missing")
    _refuse_unknown(document, DOCUMENT_KEYS, f"{source}: top level")
    items = document["experiments"]
    if not isinstance(items, Sequence) or isinstance(items, (str, bytes)) or not items:
        raise InputError(f"{source}: 'experiments' must be a non-empty list")
    out: dict[str, Experiment] = {}
    for i, raw in enumerate(items):
        exp = _experiment(raw, f"{source}: experiments[{i}]")
        if exp.id in out:
            raise InputError(f"{source}: experiments[{i}]: duplicate experiment id {exp.id!r}")
        out[exp.id] = exp
    return out


def load_experiments(path: str | Path) -> dict[str, Experiment]:
    """Read every experiment in a YAML spec file.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    dict of str to Experiment
        Keyed by experiment id, in file order.

    Raises
    ------
    InputError
        The file is missing, not YAML, or fails validation; the message names file and key.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise InputError(f"{path}: cannot read experiment spec ({exc.strerror or exc})") from None
    except UnicodeDecodeError:
        raise InputError(f"{path}: experiment spec is not UTF-8 text") from None
    try:
        document = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        loc = f" at line {mark.line + 1}" if mark is not None else ""
        raise InputError(f"{path}: not valid YAML{loc}") from None
    return parse_experiments(document, source=str(path))


def load_experiment(path: str | Path, experiment_id: str | None = None) -> Experiment:
    """Read one experiment from a YAML spec file.

    Parameters
    ----------
    path : str or Path
    experiment_id : str, optional
        Required when the file holds more than one experiment.

    Returns
    -------
    Experiment
    """
    experiments = load_experiments(path)
    if experiment_id is None:
        if len(experiments) == 1:
            return next(iter(experiments.values()))
        raise InputError(
            f"{path}: holds {len(experiments)} experiments ({', '.join(experiments)}); choose one by id"
        )
    try:
        return experiments[str(experiment_id)]
    except KeyError:
        raise InputError(
            f"{path}: no experiment with id {experiment_id!r} (found: {', '.join(experiments)})"
        ) from None
