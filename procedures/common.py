"""Shared pieces of the characterisation procedures.

Pure logic (no bench access), separately testable:

- :func:`decide` and :func:`search_threshold`: a bisection search for a rail threshold that
  spends ONE acquisition per decision where detection is clear and repeats only where it is
  noisy (sequential majority vote).
- :func:`refine_rails`: where to add points to a sweep (state flips and bends of the curve),
  down to a resolution.
- :func:`interpolate_at`, :func:`point_key`, :func:`rail_grid`.

Bench-side helpers (they take the step context ``ctx``):

- :class:`RailTracker`: puts the board in a defined state at a rail voltage -- "from below"
  (powered up from off, then raised) or "from above" (running, then lowered) -- moving the rail
  no faster than ``ctx.limits.ramp_v_per_s`` and re-establishing the state whenever the wanted
  state cannot be reached by continuing the current move. Every ``measure`` callable uses it,
  so points replayed on resume never leave the bench in an unknown state.
- :func:`measure_output` (in :mod:`benchctl.procedures.measure`): autoscale, K records, Vpp,
  frequency, THD, oscillating-or-not with its evidence, supply current.
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

from benchctl.errors import InstrumentError, InstrumentTimeout, MeasurementError, SafetyError

# --------------------------------------------------------------------------------------
# keys and grids


def point_key(*parts: object) -> str:
    """Return a point key built from ``parts`` (file-name safe: letters, digits, ``_.-``).

    Floats are written with 6 decimals so that keys follow bit-for-bit from the parameters.
    """
    out = []
    for part in parts:
        if isinstance(part, float):
            text = f"{part:.6f}"
        else:
            text = str(part)
        out.append("".join(c if c.isalnum() or c in "_.-" else "_" for c in text))
    return "-".join(out)


def rail_grid(start_v: float, stop_v: float, step_v: float) -> list[float]:
    """Rail setpoints from ``start_v`` to ``stop_v`` inclusive in steps of ``step_v``.

    The last step is shortened so that ``stop_v`` itself is always a point. Values are
    rounded to 1 uV so that keys and setpoints are reproducible.
    """
    if not step_v > 0:
        raise ValueError(f"{step_v=} must be > 0")
    span = stop_v - start_v
    n = max(1, math.ceil(abs(span) / step_v - 1e-9))
    rails = [round(start_v + span * i / n, 6) for i in range(n + 1)]
    return rails


# --------------------------------------------------------------------------------------
# sequential decisions and the threshold search


@dataclass(frozen=True)
class Vote:
    """One acquisition's verdict on "is it oscillating".

    ``score`` is signed evidence (> 0 for oscillating, in the detector's units, e.g. dB above
    its decision threshold); ``clear`` says the evidence is far enough from the decision
    boundary to be trusted alone.
    """

    oscillating: bool
    clear: bool
    score: float = 0.0


def decide(votes: Sequence[Vote], *, max_votes: int) -> bool | None:
    """Decide from the votes taken so far, or return None when another vote is needed.

    Rule: one clear vote decides alone; otherwise votes are taken until one side leads by
    two or ``max_votes`` are in (then the majority; a tie goes to the sign of the summed
    score). A clear vote taken as a repeat also decides, unless the votes so far contradict
    it by two or more. This is a truncated sequential test (Wald-style "lead by two"); it
    costs one acquisition wherever detection is unambiguous.
    """
    if max_votes < 1:
        raise ValueError(f"{max_votes=} must be >= 1")
    n = len(votes)
    if n == 0:
        return None
    on = sum(1 for v in votes if v.oscillating)
    off = n - on
    last = votes[-1]
    if n == 1 and last.clear:
        return last.oscillating
    if abs(on - off) >= 2:
        return on > off
    if last.clear:
        lead = (on - off) if last.oscillating else (off - on)
        if lead >= 0:
            return last.oscillating
    if n >= max_votes:
        if on != off:
            return on > off
        return sum(v.score for v in votes) > 0
    return None


@dataclass(frozen=True)
class Decision:
    """One decision of a threshold search: the rail, the verdict and the votes it took."""

    rail_v: float
    oscillating: bool
    votes: tuple[Vote, ...]
    label: str


@dataclass(frozen=True)
class ThresholdSearch:
    """Result of :func:`search_threshold`.

    ``value_v`` is the bracket midpoint, ``low_v``/``high_v`` the final bracket (the board
    is "off" at ``low_v`` and "on" at ``high_v``), ``u_v`` the standard uncertainty of a
    value spread uniformly over the bracket (width / sqrt(12), GUM 4.3.7). ``value_v`` is
    None when the threshold lies outside the searched range; ``note`` then says which side.
    """

    value_v: float | None
    low_v: float | None
    high_v: float | None
    u_v: float | None
    decisions: tuple[Decision, ...]
    acquisitions: int
    note: str = ""


Probe = Callable[[float, str, int], Vote]
"""probe(rail_v, label, repeat) -> Vote; ``label`` names the decision, ``repeat`` counts from 0."""


def _decide_at(probe: Probe, rail_v: float, label: str, max_votes: int) -> Decision:
    votes: list[Vote] = []
    verdict: bool | None = None
    for repeat in range(max_votes):
        votes.append(probe(rail_v, label, repeat))
        verdict = decide(votes, max_votes=max_votes)
        if verdict is not None:
            break
    assert verdict is not None  # decide() always answers once max_votes are in
    return Decision(rail_v, verdict, tuple(votes), label)


def search_threshold(
    probe: Probe,
    *,
    lo_v: float,
    hi_v: float,
    resolution_v: float,
    max_repeats: int = 4,
    check_ends: bool = True,
) -> ThresholdSearch:
    """Locate the rail voltage where a board goes from off (below) to on (above) by bisection.

    Parameters
    ----------
    probe : callable
        ``probe(rail_v, label, repeat) -> Vote`` measures once at ``rail_v``.
    lo_v, hi_v : float
        Search range, V. With ``check_ends`` both ends are probed first: the board must be
        on at ``hi_v`` and off at ``lo_v``.
    resolution_v : float
        Stop when the bracket is no wider than this, V.
    max_repeats : int
        At most this many extra acquisitions per decision where detection is noisy.
    check_ends : bool
        Probe the ends (2 decisions) instead of assuming them.

    Returns
    -------
    ThresholdSearch
        ``ceil(log2((hi_v - lo_v) / resolution_v))`` bisection decisions plus the two end
        checks, each costing one acquisition when clear.
    """
    if not resolution_v > 0:
        raise ValueError(f"{resolution_v=} must be > 0")
    if not hi_v > lo_v:
        raise ValueError(f"hi_v={hi_v!r} must be above lo_v={lo_v!r}")
    if max_repeats < 0:
        raise ValueError(f"{max_repeats=} must be >= 0")
    max_votes = 1 + max_repeats
    decisions: list[Decision] = []

    def total() -> int:
        return sum(len(d.votes) for d in decisions)

    if check_ends:
        top = _decide_at(probe, hi_v, "hi", max_votes)
        decisions.append(top)
        if not top.oscillating:
            return ThresholdSearch(None, hi_v, None, None, tuple(decisions), total(),
                                   f"not oscillating at the top of the range ({hi_v:g} V)")
        bottom = _decide_at(probe, lo_v, "lo", max_votes)
        decisions.append(bottom)
        if bottom.oscillating:
            return ThresholdSearch(None, None, lo_v, None, tuple(decisions), total(),
                                   f"still oscillating at the bottom of the range ({lo_v:g} V)")
    lo, hi = lo_v, hi_v
    i = 0
    while hi - lo > resolution_v * (1 + 1e-9):
        mid = round((lo + hi) / 2, 9)
        d = _decide_at(probe, mid, f"b{i:02d}", max_votes)
        decisions.append(d)
        if d.oscillating:
            hi = mid
        else:
            lo = mid
        i += 1
    width = hi - lo
    return ThresholdSearch((lo + hi) / 2, lo, hi, width / math.sqrt(12.0), tuple(decisions),
                           total())


# --------------------------------------------------------------------------------------
# adaptive refinement of a sweep


def refine_rails(
    rail_v: Sequence[float],
    vpp_v: Sequence[float | None],
    oscillating: Sequence[bool],
    *,
    resolution_v: float,
    bend_tol_vpp: float,
) -> list[float]:
    """Midpoints to add to a sweep: where the state flips or the Vpp curve bends.

    An interval between neighbouring points (sorted by rail) is split when it is wider than
    ``resolution_v`` and either the oscillating state differs at its ends, or an end point
    that is an interior point of three oscillating neighbours deviates from the chord of
    its neighbours by more than ``bend_tol_vpp`` (a discrete second difference, so the test
    tightens by 4x per halving of the spacing and the refinement converges).

    Returns
    -------
    list of float
        New rail setpoints (V, rounded to 1 uV), ascending, none already in ``rail_v``.
    """
    if not resolution_v > 0:
        raise ValueError(f"{resolution_v=} must be > 0")
    pts = sorted(zip(rail_v, vpp_v, oscillating, strict=True), key=lambda p: p[0])
    n = len(pts)
    split = [False] * max(0, n - 1)
    for i in range(n - 1):
        if bool(pts[i][2]) != bool(pts[i + 1][2]):
            split[i] = True
    for j in range(1, n - 1):
        (x0, y0, s0), (x1, y1, s1), (x2, y2, s2) = pts[j - 1], pts[j], pts[j + 1]
        if not (s0 and s1 and s2) or None in (y0, y1, y2) or x2 <= x0:
            continue
        chord = y0 + (y2 - y0) * (x1 - x0) / (x2 - x0)
        if abs(y1 - chord) > bend_tol_vpp:
            split[j - 1] = True
            split[j] = True
    known = {round(p[0], 6) for p in pts}
    out = []
    for i, flag in enumerate(split):
        lo, hi = pts[i][0], pts[i + 1][0]
        if flag and hi - lo > resolution_v * (1 + 1e-9):
            mid = round((lo + hi) / 2, 6)
            if mid not in known:
                out.append(mid)
                known.add(mid)
    return sorted(out)


def interpolate_at(
    x: Sequence[float], y: Sequence[float], x0: float, u: Sequence[float | None] | None = None
) -> tuple[float | None, float | None]:
    """Linear interpolation of ``y(x)`` at ``x0`` with its propagated standard uncertainty.

    Returns ``(None, None)`` when ``x0`` is outside the range of ``x`` (no extrapolation).
    The uncertainty treats the two bracketing points as independent:
    u^2 = (1-w)^2 u_a^2 + w^2 u_b^2 (GUM 5.1.2, linear combination).
    """
    pts = sorted(zip(x, y, u if u is not None else [None] * len(x), strict=True))
    if not pts or x0 < pts[0][0] - 1e-12 or x0 > pts[-1][0] + 1e-12:
        return None, None
    for (xa, ya, ua), (xb, yb, ub) in zip(pts, pts[1:], strict=False):
        if xa - 1e-12 <= x0 <= xb + 1e-12:
            if xb == xa:
                return float(ya), (None if ua is None else float(ua))
            w = (x0 - xa) / (xb - xa)
            val = (1 - w) * ya + w * yb
            unc = None
            if ua is not None and ub is not None:
                unc = math.hypot((1 - w) * ua, w * ub)
            return float(val), unc
    xa, ya, ua = pts[-1]
    return float(ya), (None if ua is None else float(ua))


# --------------------------------------------------------------------------------------
# the rail


def check_rail(ctx: Any, rail_v: float, *, what: str = "rail setpoint") -> float:
    """Refuse a rail setpoint above ``ctx.limits.max_rail_v`` (or negative) before sending it."""
    limit = ctx.limits.max_rail_v
    if not math.isfinite(rail_v) or rail_v < 0:
        raise SafetyError(f"{what} {rail_v!r} V must be a finite voltage >= 0")
    if rail_v > limit + 1e-12:
        raise SafetyError(f"{what} {rail_v:g} V is above limits.max_rail_v = {limit:g} V")
    return rail_v


@dataclass(frozen=True)
class Settling:
    """How to wait at a rail point: supply tolerance/timeout, then a hold for the board."""

    tol_v: float = 0.005
    timeout_s: float = 2.0
    hold_s: float = 0.002
    poll_s: float = 0.5e-3
    """Pause between readbacks while waiting, s: bench supplies settle small steps in about
    a millisecond (common practice, no published source), so a coarse poll would wait
    several times longer than the supply does."""


Branch = Literal["below", "above"]


def _takes_poll(supply: Any) -> bool:
    """Whether ``supply.wait_settled`` takes ``poll_s`` (a stand-in supply may not)."""
    try:
        params = inspect.signature(supply.wait_settled).parameters
    except (TypeError, ValueError):
        return False
    return "poll_s" in params


@dataclass
class RailTracker:
    """Knows which state this step left the board in, so a point can continue or re-establish.

    ``from_below(v)``: the board as seen on an upward sweep -- powered up from off at
    ``floor_v`` and raised to ``v``. ``from_above(v)``: the board as seen on a downward
    sweep -- running at ``top_v`` (held ``start_hold_s`` so it has started) and lowered
    to ``v``. ``power_cycle_at(v)``: output off, setpoint v, output on (the start-up test).
    """

    ctx: Any
    settling: Settling = field(default_factory=Settling)
    branch: str | None = None
    rail_v: float | None = None
    _set_v: float | None = None  # the setpoint this tracker last sent, V
    _set_at_s: float = -math.inf  # when, on ctx.clock, s
    _poll_kw: dict[str, float] | None = field(default=None, repr=False)  # see _settle

    SMALL_STEP_V = 0.1
    """A move no larger than this is one setpoint step (the size of the supply driver's ramp
    steps), sent directly once the ramp rate allows it."""

    # -- primitives ------------------------------------------------------------------
    @property
    def _supply(self) -> Any:
        return self.ctx.bench.supply

    def _ramp(self, rail_v: float) -> None:
        check_rail(self.ctx, rail_v)
        rate = self.ctx.limits.ramp_v_per_s
        last = self._set_v
        if last is not None and last == self.rail_v and abs(rail_v - last) <= self.SMALL_STEP_V:
            # one step from the setpoint we sent: no need to read the setpoint back first;
            # the step waits until the ramp rate allows it (as the driver's ramp does), and
            # the settling wait that follows drains the error queue
            clock = self.ctx.clock
            wait_s = abs(rail_v - last) / rate - (clock.monotonic() - self._set_at_s)
            if wait_s > 0:
                clock.sleep(wait_s)
            self._set(rail_v)
            return
        self._supply.ramp_to(rail_v, rate_v_per_s=rate)
        self._set_v, self._set_at_s = rail_v, self.ctx.clock.monotonic()

    def _set(self, rail_v: float) -> None:
        self._supply.set_voltage(rail_v)
        self._set_v, self._set_at_s = rail_v, self.ctx.clock.monotonic()

    def _settle(self, rail_v: float, hold_s: float | None = None) -> float:
        s = self.settling
        kw = self._poll_kw
        if kw is None:  # asked once: inspecting a signature costs more than a settling read
            kw = self._poll_kw = {"poll_s": s.poll_s} if _takes_poll(self._supply) else {}
        try:
            got = self._supply.wait_settled(rail_v, tol_v=s.tol_v, timeout_s=s.timeout_s, **kw)
        except InstrumentTimeout:
            # a rail that never comes may be a tripped over-voltage protection: say so
            tripped = getattr(self._supply, "protection_tripped", None)
            if tripped is not None and tripped():
                raise InstrumentError(
                    0, f"over-voltage protection tripped while settling at {rail_v:g} V; "
                    "the supply output is off",
                    resource=getattr(self._supply, "resource", "")) from None
            raise
        self.ctx.clock.sleep(s.hold_s if hold_s is None else hold_s)
        return float(got)

    def off(self) -> None:
        """Output off; the board is in a known (unpowered) state."""
        self._supply.output(False)
        self.branch, self.rail_v = "off", None
        self._set_v = None  # whoever powers up next may program the supply directly

    def power_cycle_at(self, rail_v: float, *, off_s: float = 0.0) -> float:
        """Output off, setpoint ``rail_v``, output on, settle; returns the rail readback, V."""
        check_rail(self.ctx, rail_v)
        self._supply.output(False)
        self._set_v = None
        if off_s > 0:
            self.ctx.clock.sleep(off_s)
        self._set(rail_v)
        self._supply.output(True)
        got = self._settle(rail_v)
        self.branch, self.rail_v = "below", rail_v
        return got

    # -- states ----------------------------------------------------------------------
    def from_below(self, rail_v: float, *, floor_v: float) -> float:
        """Establish the upward-sweep state at ``rail_v``; returns the rail readback, V."""
        check_rail(self.ctx, rail_v)
        if self.branch != "below" or self.rail_v is None or self.rail_v > rail_v + 1e-12:
            self.power_cycle_at(min(floor_v, rail_v))
        if self.rail_v != rail_v:
            self._ramp(rail_v)
        got = self._settle(rail_v)
        self.branch, self.rail_v = "below", rail_v
        return got

    def from_above(self, rail_v: float, *, top_v: float, start_hold_s: float = 0.01) -> float:
        """Establish the downward-sweep state at ``rail_v``; returns the rail readback, V."""
        check_rail(self.ctx, rail_v)
        check_rail(self.ctx, top_v, what="running rail")
        if self.branch != "above" or self.rail_v is None or self.rail_v < rail_v - 1e-12:
            if self.branch in (None, "off") or not self._supply.is_output_on():
                self.power_cycle_at(top_v)
            else:
                self._ramp(top_v)
            self._settle(top_v, hold_s=start_hold_s)
            self.branch, self.rail_v = "above", top_v
        if self.rail_v != rail_v:
            self._ramp(rail_v)
        got = self._settle(rail_v)
        self.branch, self.rail_v = "above", rail_v
        return got

    def at(self, rail_v: float, *, branch: Branch, floor_v: float, top_v: float) -> float:
        """Dispatch to :meth:`from_below` or :meth:`from_above`."""
        if branch == "below":
            return self.from_below(rail_v, floor_v=floor_v)
        return self.from_above(rail_v, top_v=top_v)


# --------------------------------------------------------------------------------------
# results helpers


def finite_or_none(value: Any) -> float | None:
    """``float(value)`` when it is a finite number, else None (for row values)."""
    if value is None:
        return None
    try:
        f = float(value)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def require_rows(rows: Sequence[Mapping[str, Any]], *, what: str, minimum: int) -> None:
    """Raise MeasurementError when fewer than ``minimum`` usable rows are there."""
    if len(rows) < minimum:
        raise MeasurementError(f"{what}: {len(rows)} usable points, need at least {minimum}")
