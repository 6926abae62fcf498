"""Every selected test of one stream in one call: the engine's fast path.

The detectors in :mod:`~limitwatch.stats.rules` and :mod:`~limitwatch.stats.smoothing` are the
reference: one small class per test, each checking its own input and compared in the tests with a
plain batch re-scan. A stream monitor running a dozen of them paid, on every reading, a dozen
method calls and a dozen checks of finiteness and position that the monitor had already made,
and the two m-of-n zone rules each shifted bit masks of their own. Measured with process CPU
time against a flat loop doing the same work, that was a third of the flat loop's speed.

:class:`FusedRules` does the same work in one method. It places each reading in its zone once
(``|z|`` against each boundary), keeps one zone window that ``two-of-three-zone-a`` and
``four-of-five-zone-b`` share (four bits per reading: above the A boundary, below it, above the B
boundary, below it; a rule's restart clears only its own two bits), skips the window rules
entirely for a reading in neither of their zones (it cannot complete either), and trusts the
caller for the position (one more per call) and for finite input. Its results are the reference
detectors' exactly: the same :class:`~limitwatch.stats.signal.Signal` objects, in the order of
the selection, and the same checkpoint state (:meth:`FusedRules.state` gives each detector's
``state()`` values), so checkpoints written before it existed restore unchanged. A hypothesis
test (``tests/test_fused.py``) holds it to that at every prefix, across a state round trip.

:class:`FusedPlan` holds what every stream under the same settings shares: the parameters,
checked once when the reference detectors are built from the selection, and the constants
derived from them. A stream's :class:`FusedRules` holds only its counters.

>>> from limitwatch.stats.rules import parse_rules
>>> plan = FusedPlan(parse_rules("western-electric"))
>>> rules = FusedRules(plan)
>>> [rules.update(i, z, None) for i, z in enumerate([2.5, 0.3])]
[(), ()]
>>> [(s.rule, s.side, s.involved) for s in rules.update(2, 2.1, 0.5)]
[('two-of-three-zone-a', 'upper', (0, 1, 2))]

References
----------
Western Electric Co. (1956). *Statistical Quality Control Handbook* (zones A, B and C).
Nelson, L. S. (1984). The Shewhart control chart -- tests for special causes. *Journal of
Quality Technology* 16(4), 237-239.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from typing import Any

from limitwatch.stats.rules import DETECTORS, RuleSpec
from limitwatch.stats.signal import Detector, Side, Signal

_INF = math.inf
_sqrt = math.sqrt

FUSED_RULES = frozenset(
    {
        "beyond-limits",
        "two-of-three-zone-a",
        "four-of-five-zone-b",
        "run-one-side",
        "trend",
        "alternating",
        "hugging-center",
        "avoiding-center",
        "ewma",
        "cusum",
        "mr-beyond-limit",
    }
)
"""Every detector :class:`FusedRules` runs; a test checks that it is every detector there is,
so a rule added to the registry must be taught here too."""


def _spelt_out(detector: Detector) -> str:
    """``rule(param=value, ...)``, parameters by name, defaults included.

    >>> _spelt_out(DETECTORS["run-one-side"]())
    'run-one-side(length=8)'
    """
    params = sorted(detector.state()["params"].items())
    return f"{detector.rule}({', '.join(f'{k}={v!r}' for k, v in params)})"


def _lanes(window: int, lane: int) -> int:
    """The bits of one lane of the shared zone window, for the ``window`` newest readings."""
    return sum(1 << (4 * age + lane) for age in range(window))


def _compact(win: int, lane: int, window: int) -> int:
    """One lane of the shared window as the reference detector's mask (bit ``age``)."""
    return sum(1 << age for age in range(window) if win >> (4 * age + lane) & 1)


@functools.lru_cache(maxsize=4096)
def _spread(mask: int, lane: int, window: int) -> int:
    """The reference detector's mask placed in one lane of the shared window."""
    return sum(1 << (4 * age + lane) for age in range(window) if mask >> age & 1)


_TABLE_WINDOW = 8
"""Longest window whose masks :func:`_spread_tables` lists (256 of each); a longer one's
masks are placed one by one."""


def _spread_tables(lane: int, window: int) -> tuple[tuple[int, ...], tuple[int, ...]]:
    """:func:`_spread` of every mask of ``window`` bits, for the up lane and the down lane.

    Indexing one with a saved mask gives what :func:`_spread` gives: a negative mask of at
    least ``-2**window`` indexes from the end, which holds the same low bits (two's
    complement); any other int is out of range and left to :func:`_spread`.
    """
    if window > _TABLE_WINDOW:
        return (), ()
    masks = range(1 << window)
    return (tuple(_spread(m, lane, window) for m in masks),
            tuple(_spread(m, lane + 1, window) for m in masks))  # fmt: skip


class FusedPlan:
    """The selection's parameters and derived constants, made once per settings.

    Building it builds every selected reference detector once, so a parameter that a
    detector would refuse is refused here with the same message.
    """

    __slots__ = (
        "alt_len",
        "avoid",
        "beyond_k",
        "cusum",
        "ewma",
        "full",
        "hug",
        "key",
        "mr_limit",
        "order",
        "rank",
        "run_len",
        "spread",
        "trend_len",
        "windows",
        "zone_low",
        "zones",
    )

    def __init__(self, specs: Iterable[RuleSpec]) -> None:
        detectors = [spec.build() for spec in specs]
        self.order: tuple[str, ...] = tuple(d.rule for d in detectors)
        """Rule ids in selection order, X chart first: the order of the states in
        :meth:`FusedRules.state` and of the signals."""
        if len(set(self.order)) != len(self.order):
            raise ValueError(f"a rule is selected twice: {', '.join(self.order)}")
        by_rule = {d.rule: d for d in detectors}
        unknown = set(by_rule) - FUSED_RULES
        if unknown:
            raise ValueError(f"the fused path does not run {', '.join(sorted(unknown))}")
        x_first = [r for r in self.order if DETECTORS[r].chart == "x"]
        self.order = (*x_first, *(r for r in self.order if DETECTORS[r].chart == "mr"))
        self.rank = {rule: i for i, rule in enumerate(self.order)}
        self.key = ", ".join(_spelt_out(by_rule[rule]) for rule in self.order)
        """Every detector with all its parameters, in :attr:`order`: a saved state whose key
        differs was counted under other rules, and its counts must not be reused."""

        def get(rule: str, name: str, absent: Any) -> Any:
            det = by_rule.get(rule)
            return absent if det is None else getattr(det, name)

        self.beyond_k: float = get("beyond-limits", "k", _INF)
        # The shared zone window, four bits per reading (lanes 0 and 1 for two-of-three above
        # and below, 2 and 3 for four-of-five). Per rule: (rule, count, boundary, up lane,
        # down lane, this reading's up bit, its down bit, the window with this rule's lanes
        # cleared); the boundary is inf when the rule is not selected.
        self.windows: dict[str, tuple[int, int]] = {}
        """(first lane, window length) of each selected window rule, for checkpoints."""
        for rule, lane in (("two-of-three-zone-a", 0), ("four-of-five-zone-b", 2)):
            det = by_rule.get(rule)
            if det is not None:
                self.windows[rule] = (lane, det.window)  # type: ignore[attr-defined]
        self.spread: dict[str, tuple[tuple[int, ...], tuple[int, ...]]] = {
            rule: _spread_tables(lane, window) for rule, (lane, window) in self.windows.items()
        }
        """Per window rule, every saved up and down mask already placed in its lanes (by
        mask), for restoring checkpoints without working each one out again."""
        longest = max((window for _lane, window in self.windows.values()), default=0)
        self.full = (1 << (4 * longest)) - 1
        rules = []
        for rule, lane in (("two-of-three-zone-a", 0), ("four-of-five-zone-b", 2)):
            det = by_rule.get(rule)
            if det is None:
                rules.append((rule, 1, _INF, 0, 0, 0, 0, self.full))
                continue
            up = _lanes(det.window, lane)  # type: ignore[attr-defined]
            down = up << 1
            others = self.full & ~(up | down)
            count, boundary = det.count, det.boundary  # type: ignore[attr-defined]
            rules.append((rule, count, boundary, up, down, 1 << lane, 2 << lane, others))
        self.zones = tuple(rules)
        self.zone_low = min(r[2] for r in self.zones)
        """A reading no farther than this from the center can complete neither window rule."""
        self.run_len: int = get("run-one-side", "length", 0)
        self.trend_len: int = get("trend", "length", 0)
        self.alt_len: int = get("alternating", "length", 0)
        self.hug: tuple[int, float] = (get("hugging-center", "length", 0),
                                       get("hugging-center", "boundary", 0.0))  # fmt: skip
        self.avoid: tuple[int, float] = (get("avoiding-center", "length", 0),
                                         get("avoiding-center", "boundary", _INF))  # fmt: skip
        ewma: Any = by_rule.get("ewma")
        self.ewma = None
        if ewma is not None:
            self.ewma = (ewma.lam, ewma._keep, ewma.L, ewma._var, ewma._asymptotic, ewma._settled,
                         ewma._span)  # fmt: skip
        cusum: Any = by_rule.get("cusum")
        self.cusum = None if cusum is None else (cusum.k, cusum.h, cusum.headstart)
        self.mr_limit: float = get("mr-beyond-limit", "limit", _INF)


class FusedRules:
    """One stream's counters for every test of a :class:`FusedPlan`.

    ``update(index, z, mr)`` takes the reading's position (one more than the last, which the
    caller owns), ``z = (x - center) / sigma`` and the moving range in sigma units (None when
    there is none), and returns the signals of this reading in selection order (usually none).
    """

    __slots__ = (
        "_alt_len",
        "_alt_prev",
        "_alt_step",
        "_avoid",
        "_cd",
        "_cd_len",
        "_cu",
        "_cu_len",
        "_ew",
        "_ew_n",
        "_hug",
        "_last",
        "_plan",
        "_run",
        "_trend_prev",
        "_trend_run",
        "_win",
    )

    def __init__(self, plan: FusedPlan) -> None:
        self._plan = plan
        self.reset()

    def reset(self) -> None:
        """Forget everything, as fresh reference detectors would."""
        self._last: int | None = None
        self._win = self._run = self._trend_run = self._alt_step = self._alt_len = 0
        self._trend_prev: float | None = None
        self._alt_prev: float | None = None
        self._hug = self._avoid = self._ew_n = self._cu_len = self._cd_len = 0
        self._ew = 0.0
        start = 0.0 if self._plan.cusum is None else self._plan.cusum[2]
        self._cu = self._cd = start

    def update(self, index: int, z: float, mr: float | None) -> tuple[Signal, ...]:
        side: Side
        up: float
        down: float
        if z - z != 0.0 or (mr is not None and mr - mr != 0.0):  # inf - inf and NaN are NaN
            raise ValueError(f"reading {index}: z={z!r}, moving range {mr!r} is not finite")
        plan = self._plan
        self._last = index
        hits: tuple[Signal, ...] = ()
        az = z if z >= 0.0 else -z
        # beyond-limits (k is inf when not selected)
        k = plan.beyond_k
        if az > k:
            side, bound = ("upper", k) if z > 0.0 else ("lower", -k)
            hits += (Signal("beyond-limits", "x", side, index, (index,), z, bound),)
        # two-of-three-zone-a and four-of-five-zone-b on the shared window
        win = (self._win << 4) & plan.full
        if az > plan.zone_low:
            for rule, count, boundary, up, down, up_bit, down_bit, others in plan.zones:
                if az > boundary:
                    if z > 0.0:
                        win |= up_bit
                        mask = win & up
                    else:
                        win |= down_bit
                        mask = win & down
                    if mask.bit_count() >= count:
                        win &= others
                        first = index - ((mask.bit_length() - 1) >> 2)
                        side = "upper" if z > 0.0 else "lower"
                        hits += (Signal(rule, "x", side, index, tuple(range(first, index + 1))),)
        self._win = win
        # run-one-side
        length = plan.run_len
        if length:
            run = self._run
            if z > 0.0:
                run = run + 1 if run > 0 else 1
            elif z < 0.0:
                run = run - 1 if run < 0 else -1
            else:
                run = 0
            if run >= length or -run >= length:
                self._run = 0
                side = "upper" if run > 0 else "lower"
                involved = tuple(range(index - length + 1, index + 1))
                hits += (Signal("run-one-side", "x", side, index, involved),)
            else:
                self._run = run
        # trend
        length = plan.trend_len
        if length:
            prev, run = self._trend_prev, self._trend_run
            if prev is None or z == prev:
                run = 0
            elif z > prev:
                run = run + 1 if run > 0 else 2
            else:
                run = run - 1 if run < 0 else -2
            if run >= length or -run >= length:
                self._trend_prev, self._trend_run = None, 0
                side = "upper" if run > 0 else "lower"
                involved = tuple(range(index - length + 1, index + 1))
                hits += (Signal("trend", "x", side, index, involved),)
            else:
                self._trend_prev, self._trend_run = z, run
        # alternating
        length = plan.alt_len
        if length:
            prev = self._alt_prev
            step = 0 if prev is None else (z > prev) - (z < prev)
            if step == 0:
                n = 1
            elif step == -self._alt_step:
                n = self._alt_len + 1
            else:
                n = 2
            if n >= length:
                self._alt_prev, self._alt_step, self._alt_len = None, 0, 0
                involved = tuple(range(index - n + 1, index + 1))
                hits += (Signal("alternating", "x", "both", index, involved),)
            else:
                self._alt_prev, self._alt_step, self._alt_len = z, step, n
        # hugging-center
        length, boundary = plan.hug
        if length:
            n = self._hug + 1 if az < boundary else 0
            if n >= length:
                self._hug = 0
                involved = tuple(range(index - n + 1, index + 1))
                hits += (Signal("hugging-center", "x", "both", index, involved),)
            else:
                self._hug = n
        # avoiding-center
        length, boundary = plan.avoid
        if length:
            n = self._avoid + 1 if az > boundary else 0
            if n >= length:
                self._avoid = 0
                involved = tuple(range(index - n + 1, index + 1))
                hits += (Signal("avoiding-center", "x", "both", index, involved),)
            else:
                self._avoid = n
        # EWMA
        if plan.ewma is not None:
            lam, keep, big_l, var, asymptotic, settled, span = plan.ewma
            w = lam * z + keep * self._ew
            n = self._ew_n + 1
            limit = asymptotic if n >= settled else big_l * _sqrt(var * (1.0 - keep ** (2 * n)))
            if w > limit or w < -limit:
                self._ew, self._ew_n = 0.0, 0
                side, bound = ("upper", limit) if w > 0 else ("lower", -limit)
                involved = tuple(range(index - min(n, span) + 1, index + 1))
                hits += (Signal("ewma", "x", side, index, involved, w, bound),)
            else:
                self._ew, self._ew_n = w, n
        # CUSUM
        if plan.cusum is not None:
            k, h, headstart = plan.cusum
            up = self._cu + z - k
            down = self._cd - z - k
            if up > 0.0:
                up_len = self._cu_len + 1
            else:
                up, up_len = 0.0, 0
            if down > 0.0:
                down_len = self._cd_len + 1
            else:
                down, down_len = 0.0, 0
            if up > h or down > h:
                self._cu = self._cd = headstart
                self._cu_len = self._cd_len = 0
                side, stat, n = ("upper", up, up_len) if up > h else ("lower", down, down_len)
                involved = tuple(range(index - n + 1, index + 1))
                hits += (Signal("cusum", "x", side, index, involved, stat, h),)
            else:
                self._cu, self._cd, self._cu_len, self._cd_len = up, down, up_len, down_len
        # mr-beyond-limit (limit inf when not selected)
        limit = plan.mr_limit
        if mr is not None and mr > limit:
            involved = (index - 1, index) if index > 0 else (index,)
            hits += (Signal("mr-beyond-limit", "mr", "upper", index, involved, mr, limit),)
        if len(hits) > 1:
            hits = tuple(sorted(hits, key=lambda s: plan.rank[s.rule]))
        return hits

    # -- checkpoints -----------------------------------------------------------------------------

    def state(self) -> dict[str, Any]:
        """``{"rules": the plan's key, "states": [...]}``, plain JSON-ready data from which
        :meth:`from_state` continues exactly. ``states`` holds, for each selected rule in the
        plan's order, the values of its reference detector's ``state()["state"]`` in their
        order: the counters by position, since the key already names the rules and
        parameters once (a stream's checkpoint keeps this, for hundreds of thousands of
        streams)."""
        return {"rules": self._plan.key, "states": [self._state_of(r) for r in self._plan.order]}

    def _state_of(self, rule: str) -> list[Any]:
        last, plan = self._last, self._plan
        if rule in ("beyond-limits", "mr-beyond-limit"):
            return []
        if rule in plan.windows:
            lane, window = plan.windows[rule]
            return [_compact(self._win, lane, window), _compact(self._win, lane + 1, window), last]
        table: dict[str, Callable[[], list[Any]]] = {
            "run-one-side": lambda: [self._run, last],
            "trend": lambda: [self._trend_prev, self._trend_run, last],
            "alternating": lambda: [self._alt_prev, self._alt_step, self._alt_len, last],
            "hugging-center": lambda: [self._hug, last],
            "avoiding-center": lambda: [self._avoid, last],
            "ewma": lambda: [self._ew, self._ew_n, last],
            "cusum": lambda: [self._cu, self._cd, self._cu_len, self._cd_len, last],
        }
        return table[rule]()

    @classmethod
    def from_state(
        cls, data: Mapping[str, Any], plan: FusedPlan, *, position: int | None = None
    ) -> FusedRules:
        """The counters :meth:`state` described, for ``plan``; fresh counters when the state
        was saved under other rules or parameters (its ``rules`` differ from the plan's key),
        since counts made against other rules mean nothing under these.

        ``position``, when it equals the saved last position, is kept instead of the saved
        number, so that every stream's counters share the monitor's int rather than holding
        one JSON gave each of them."""
        rules = cls(plan)
        if data.get("rules") == plan.key:
            rules._load(data["states"], position)
        return rules

    def _load(self, states: Sequence[Sequence[Any]], position: int | None) -> None:
        plan = self._plan
        if len(states) != len(plan.order):
            raise ValueError(f"{len(plan.order)} detector states expected, got {len(states)}")
        win = 0
        last: Any = None
        spread = plan.spread  # a restart runs this loop for every stream: lookups hoisted
        for rule, values in zip(plan.order, states):  # noqa: B905 -- lengths checked above
            try:
                tables = spread.get(rule)
                if tables is not None:
                    up, down, last = values
                    try:
                        win |= tables[0][up] | tables[1][down]
                    except IndexError:  # a window too long to list, or a mask out of range
                        lane, window = plan.windows[rule]
                        win |= _spread(up, lane, window) | _spread(down, lane + 1, window)
                elif rule == "ewma":
                    w, n, last = values
                    self._ew, self._ew_n = float(w), int(n)
                elif rule == "cusum":
                    up_, down_, up_len, down_len, last = values
                    self._cu, self._cd = float(up_), float(down_)
                    self._cu_len, self._cd_len = int(up_len), int(down_len)
                elif rule == "run-one-side":
                    self._run, last = values
                elif rule == "trend":
                    self._trend_prev, self._trend_run, last = values
                elif rule == "alternating":
                    self._alt_prev, self._alt_step, self._alt_len, last = values
                elif rule == "hugging-center":
                    self._hug, last = values
                elif rule == "avoiding-center":
                    self._avoid, last = values
                elif values:  # beyond-limits, mr-beyond-limit
                    raise ValueError
            except (TypeError, ValueError):
                raise ValueError(f"{rule}: cannot use the saved state {values!r}") from None
        self._win = win
        self._last = position if position is not None and last == position else last
