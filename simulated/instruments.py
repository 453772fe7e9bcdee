"""The three simulated instruments and their SCPI-1999 command trees.

The trees follow the wire contract in DEVELOPERS.md ("The wire contract"). Words the
standard has none for are our own: ``INPut<n>:PROBe``, ``TRACe:SCALing?``,
``TRACe:CLIPped?``. Extra queries beyond the contract are listed in each ``build``.
"""

from __future__ import annotations

import math

import numpy as np

from benchctl.scpi import (
    NAN_VALUE,
    CommandTree,
    ScpiError,
    encode_block,
    format_boolean,
    format_nr1,
    format_nr3,
)
from benchctl.simulated.physics import SHAPES, BenchModel, ChannelSettings, Record
from benchctl.simulated.server import Instrument, suffix_in

_BOUNDS = ("MINimum", "MAXimum", "DEFault")


def _bounded_query(call, value: float, lo: float, hi: float, default: float) -> str:
    """``X?`` gives the value; ``X? MIN|MAX|DEF`` gives the bound (SCPI-1999 common practice)."""
    if call.has(0):
        call.expect(1)
        which = call.choice(0, _BOUNDS)
        value = {"MINimum": lo, "MAXimum": hi, "DEFault": default}[which]
    else:
        call.expect(0)
    return format_nr3(value)


def _short_upper(choice: str) -> str:
    """Short form of a declared choice, as SCPI character responses give it."""
    return "".join(c for c in choice if c.isupper() or c.isdigit())


# --------------------------------------------------------------------------------------
class SupplyInstrument(Instrument):
    """Programmable DC supply (one output).

    Beyond the contract: ``STATus:QUEStionable[:EVENt]?`` (same as the condition).
    """

    role = "supply"
    model_name = "SIM-DC-SUPPLY"
    MAX_V = 30.0
    MAX_A = 3.0
    MAX_OVP_V = 33.0

    def reset(self) -> None:
        b = self.bench
        b.supply.reset()
        b.supply_changed()

    def questionable(self) -> int:
        b = self.bench
        return (1 if b.supply.tripped else 0) | (2 if b.supply_mode() == "cc" else 0)

    def build(self, t: CommandTree) -> None:
        b = self.bench
        s = b.supply

        def set_v(call):
            call.expect(1)
            s.setpoint_v = call.numeric(0, unit="V", minimum=0.0, maximum=self.MAX_V, default=0.0)
            b.supply_changed()

        def set_i(call):
            call.expect(1)
            s.current_limit_a = call.numeric(0, unit="A", minimum=1e-3, maximum=self.MAX_A,
                                              default=0.1)
            b.supply_changed()

        def set_ovp(call):
            call.expect(1)
            s.ovp_v = call.numeric(0, unit="V", minimum=0.5, maximum=self.MAX_OVP_V,
                                   default=self.MAX_OVP_V)
            b.supply_changed()

        def trip_q(call):
            call.expect(0)
            return format_boolean(s.tripped)

        def clear(call):
            call.expect(0)
            s.tripped = False
            b.supply_changed()

        def out_set(call):
            call.expect(1)
            on = call.boolean(0)
            if on and s.tripped:
                raise ScpiError(-221, "over-voltage protection tripped; clear it first")
            s.output_on = on
            b.supply_changed()

        def out_q(call):
            call.expect(0)
            return format_boolean(s.output_on)

        def meas_v(call):
            call.expect(0)
            return format_nr3(b.readback("voltage"))

        def meas_i(call):
            call.expect(0)
            return format_nr3(b.readback("current"))

        t.add("[SOURce]:VOLTage[:LEVel][:IMMediate][:AMPLitude]", set=set_v,
              query=lambda c: _bounded_query(c, s.setpoint_v, 0.0, self.MAX_V, 0.0))
        t.add("[SOURce]:CURRent[:LEVel][:IMMediate][:AMPLitude]", set=set_i,
              query=lambda c: _bounded_query(c, s.current_limit_a, 1e-3, self.MAX_A, 0.1))
        t.add("[SOURce]:VOLTage:PROTection[:LEVel]", set=set_ovp,
              query=lambda c: _bounded_query(c, s.ovp_v, 0.5, self.MAX_OVP_V, self.MAX_OVP_V))
        t.add("[SOURce]:VOLTage:PROTection:TRIPped", query=trip_q)
        t.add("[SOURce]:VOLTage:PROTection:CLEar", set=clear)
        t.add("OUTPut[:STATe]", set=out_set, query=out_q)
        t.add("MEASure[:SCALar]:VOLTage[:DC]", query=meas_v)
        t.add("MEASure[:SCALar]:CURRent[:DC]", query=meas_i)


# --------------------------------------------------------------------------------------
class GeneratorInstrument(Instrument):
    """Function generator (one output): sine, square, triangle, DC."""

    role = "generator"
    model_name = "SIM-FUNC-GEN"
    MAX_HZ = 20e6
    MIN_HZ = 1e-3
    MAX_VPP = 20.0
    MIN_VPP = 1e-3
    MAX_V = 10.0

    def reset(self) -> None:
        self.bench.generator.reset()
        self._changed()

    def _changed(self) -> None:
        b = self.bench
        b._truncate_history(b.clock.now())
        b.supply_changed()

    def build(self, t: CommandTree) -> None:
        g = self.bench.generator

        def shape_set(call):
            suffix_in(call)
            call.expect(1)
            g.shape = call.choice(0, SHAPES)
            self._changed()

        def shape_q(call):
            suffix_in(call)
            call.expect(0)
            return _short_upper(g.shape)

        def freq_set(call):
            suffix_in(call)
            call.expect(1)
            g.freq_hz = call.numeric(0, unit="HZ", minimum=self.MIN_HZ, maximum=self.MAX_HZ,
                                     default=1e3)
            self._changed()

        def vpp_set(call):
            suffix_in(call)
            call.expect(1)
            vpp = call.numeric(0, unit="V", minimum=self.MIN_VPP, maximum=self.MAX_VPP,
                               default=0.1)
            if abs(g.offset_v) + vpp / 2 > self.MAX_V:
                raise ScpiError(-221, f"offset {g.offset_v:g} V + {vpp:g} Vpp exceeds +/-10 V")
            g.vpp_v = vpp
            self._changed()

        def off_set(call):
            suffix_in(call)
            call.expect(1)
            off = call.numeric(0, unit="V", minimum=-self.MAX_V, maximum=self.MAX_V, default=0.0)
            if abs(off) + (g.vpp_v / 2 if g.shape != "DC" else 0.0) > self.MAX_V:
                raise ScpiError(-221, f"offset {off:g} V + {g.vpp_v:g} Vpp exceeds +/-10 V")
            g.offset_v = off
            self._changed()

        def out_set(call):
            suffix_in(call)
            call.expect(1)
            g.output_on = call.boolean(0)
            self._changed()

        def q(value_fn, lo, hi, default):
            def handler(call):
                suffix_in(call)
                return _bounded_query(call, value_fn(), lo, hi, default)
            return handler

        def out_q(call):
            suffix_in(call)
            call.expect(0)
            return format_boolean(g.output_on)

        t.add("[SOURce#]:FUNCtion[:SHAPe]", set=shape_set, query=shape_q)
        t.add("[SOURce#]:FREQuency[:CW]", set=freq_set,
              query=q(lambda: g.freq_hz, self.MIN_HZ, self.MAX_HZ, 1e3))
        t.add("[SOURce#]:VOLTage[:LEVel][:IMMediate][:AMPLitude]", set=vpp_set,
              query=q(lambda: g.vpp_v, self.MIN_VPP, self.MAX_VPP, 0.1))
        t.add("[SOURce#]:VOLTage[:LEVel][:IMMediate]:OFFSet", set=off_set,
              query=q(lambda: g.offset_v, -self.MAX_V, self.MAX_V, 0.0))
        t.add("OUTPut#[:STATe]", set=out_set, query=out_q)


# --------------------------------------------------------------------------------------
class ScopeInstrument(Instrument):
    """Two-channel oscilloscope with an 8-bit ADC (ch1 = board output, ch2 = rail).

    Beyond the contract: ``STATus:OPERation[:EVENt]?`` (same as the condition). Edge
    triggers place the trigger 10 % into the record (``t0`` in ``TRACe:SCALing?``); a
    trigger that does not come within 1 s of wall clock is replaced by an automatic one.
    Changing a setting while armed re-arms.
    """

    role = "scope"
    model_name = "SIM-SCOPE-2CH"
    CHANNELS = (1, 2)
    MAX_POINTS = 2_000_000
    MIN_POINTS = 16

    def __init__(self, bench: BenchModel, **kw) -> None:
        self.fmt = "ASCii"
        self.int_bits = 8
        self.big_endian = True
        super().__init__(bench, **kw)

    def reset(self) -> None:
        b = self.bench
        b.abort()
        for cs in b.scope.channels.values():
            cs.__init__()
        sc = b.scope
        sc.window_s, sc.points = 1e-3, 10_000
        sc.trigger_source, sc.trigger_level_v, sc.trigger_slope = "IMMediate", 0.0, "POSitive"
        sc.continuous = False
        self.fmt, self.int_bits, self.big_endian = "ASCii", 8, True

    def pending(self) -> bool:
        return self.bench.measuring()

    def wait_pending(self) -> None:
        b = self.bench
        if b.scope.continuous:
            b.advance_continuous()
        else:
            b.wait_complete(stop=self.stop)

    def operation(self) -> int:
        return 16 if self.bench.measuring() else 0

    def after_message(self) -> None:
        """Once the message that armed an acquisition is answered: make its record, and
        encode it in the present transfer format, while the modelled time runs."""
        b = self.bench
        if not b.early_record_due:
            return
        with b.lock:
            rec = b.make_early_record()
            if rec is not None and self.fmt == "INTeger":
                for ch, codes in rec.codes.items():
                    if codes.size:
                        self._encoded(rec, ch)

    def _rearm_if_armed(self) -> None:
        b = self.bench
        if b.acq is not None and b.acq.settings_key != b.scope.key():
            b.arm()

    def _encoded(self, rec: Record, ch: int) -> memoryview:
        """Channel ``ch`` of ``rec`` as a binary block in the present format (cached)."""
        key = (ch, self.int_bits, self.big_endian)
        block = rec.cache.get(key)
        if block is None:
            codes = rec.codes[ch]
            if self.int_bits == 8:
                data = encode_block(codes, dtype="int8")
            else:
                data = encode_block(codes.astype(np.int16) * 256, dtype="int16",
                                    big_endian=self.big_endian)
            block = rec.cache[key] = memoryview(data)
        return block

    def _record(self, call) -> tuple[Record, int]:
        ch = _channel_param(call)
        rec = self.bench.latest_record()
        if rec is None:
            raise ScpiError(-230, "no record acquired yet")
        if ch not in rec.codes or rec.codes[ch].size == 0:
            raise ScpiError(-221, f"channel {ch} was off in the last record")
        return rec, ch

    def build(self, t: CommandTree) -> None:
        b = self.bench
        sc = b.scope

        def chan(call) -> ChannelSettings:
            return sc.channels[suffix_in(call, self.CHANNELS)]

        def ch_num(attr, lo_fn, hi_fn, unit="V"):
            def setter(call):
                cs = chan(call)
                call.expect(1)
                setattr(cs, attr, call.numeric(0, unit=unit, minimum=lo_fn(cs), maximum=hi_fn(cs),
                                               default=getattr(ChannelSettings(), attr)))
                self._rearm_if_armed()

            def getter(call):
                cs = chan(call)
                return _bounded_query(call, getattr(cs, attr), lo_fn(cs), hi_fn(cs),
                                      getattr(ChannelSettings(), attr))
            return setter, getter

        s_, g_ = ch_num("range_v", lambda cs: 8e-3 * cs.probe, lambda cs: 400.0 * cs.probe)
        t.add("SENSe#:VOLTage[:DC]:RANGe[:PTPeak]", set=s_, query=g_)
        s_, g_ = ch_num("offset_v", lambda cs: -200.0 * cs.probe, lambda cs: 200.0 * cs.probe)
        t.add("SENSe#:VOLTage[:DC]:RANGe:OFFSet", set=s_, query=g_)
        s_, g_ = ch_num("probe", lambda cs: 1e-3, lambda cs: 1e3, unit=None)
        t.add("INPut#:PROBe", set=s_, query=g_)

        def coup_set(call):
            cs = chan(call)
            call.expect(1)
            cs.coupling = call.choice(0, ("AC", "DC"))
            self._rearm_if_armed()

        def coup_q(call):
            cs = chan(call)
            call.expect(0)
            return cs.coupling

        def state_set(call):
            cs = chan(call)
            call.expect(1)
            cs.enabled = call.boolean(0)
            self._rearm_if_armed()

        def state_q(call):
            cs = chan(call)
            call.expect(0)
            return format_boolean(cs.enabled)

        t.add("INPut#:COUPling", set=coup_set, query=coup_q)
        t.add("INPut#[:STATe]", set=state_set, query=state_q)

        def time_set(call):
            call.expect(1)
            sc.window_s = call.numeric(0, unit="S", minimum=1e-7, maximum=10.0, default=1e-3)
            self._rearm_if_armed()

        def points_set(call):
            call.expect(1)
            sc.points = call.integer(0, minimum=self.MIN_POINTS, maximum=self.MAX_POINTS,
                                     default=10_000)
            self._rearm_if_armed()

        def tint_q(call):
            call.expect(0)
            return format_nr3(sc.dt_s)

        t.add("SENSe:SWEep:TIME", set=time_set,
              query=lambda c: _bounded_query(c, sc.window_s, 1e-7, 10.0, 1e-3))
        def points_q(call):
            if call.has(0):
                call.expect(1)
                which = call.choice(0, _BOUNDS)
                return format_nr1({"MINimum": self.MIN_POINTS, "MAXimum": self.MAX_POINTS,
                                   "DEFault": 10_000}[which])
            call.expect(0)
            return format_nr1(sc.points)

        t.add("SENSe:SWEep:POINts", set=points_set, query=points_q)
        t.add("SENSe:SWEep:TINTerval", query=tint_q)

        def src_set(call):
            call.expect(1)
            sc.trigger_source = _trigger_source(call.params[0])
            call.has(0)
            self._rearm_if_armed()

        def src_q(call):
            call.expect(0)
            return "IMM" if sc.trigger_source == "IMMediate" else f"INT{sc.trigger_source[-1]}"

        def level_set(call):
            call.expect(1)
            sc.trigger_level_v = call.numeric(0, unit="V", minimum=-1000.0, maximum=1000.0,
                                              default=0.0)
            self._rearm_if_armed()

        def slope_set(call):
            call.expect(1)
            sc.trigger_slope = call.choice(0, ("POSitive", "NEGative"))
            self._rearm_if_armed()

        def slope_q(call):
            call.expect(0)
            return _short_upper(sc.trigger_slope)

        t.add("TRIGger[:SEQuence]:SOURce", set=src_set, query=src_q)
        t.add("TRIGger[:SEQuence]:LEVel", set=level_set,
              query=lambda c: _bounded_query(c, sc.trigger_level_v, -1000.0, 1000.0, 0.0))
        t.add("TRIGger[:SEQuence]:SLOPe", set=slope_set, query=slope_q)

        def init(call):
            call.expect(0)
            if b.acq is not None and b.measuring():
                raise ScpiError(-213, "acquisition already in progress")
            b.arm()

        def cont_set(call):
            call.expect(1)
            on = call.boolean(0)
            sc.continuous = on
            if on and b.acq is None:
                b.arm()
            elif not on:
                pass  # the armed acquisition (if any) completes as a single one

        def cont_q(call):
            call.expect(0)
            return format_boolean(sc.continuous)

        def abort(call):
            call.expect(0)
            b.abort()

        t.add("INITiate[:IMMediate]", set=init)
        t.add("INITiate:CONTinuous", set=cont_set, query=cont_q)
        t.add("ABORt", set=abort)

        def fmt_set(call):
            call.expect(1, 2)
            kind = call.choice(0, ("ASCii", "INTeger"))
            if kind == "ASCii":
                if len(call.params) > 1:
                    call.integer(1)  # a length is allowed and ignored for ASCii
                self.fmt = "ASCii"
                return
            bits = call.integer(1) if len(call.params) > 1 else 8
            if bits not in (8, 16):
                raise ScpiError(-224, f"INTeger length {bits} (8 or 16)")
            self.fmt, self.int_bits = "INTeger", bits

        def fmt_q(call):
            call.expect(0)
            return "ASC,0" if self.fmt == "ASCii" else f"INT,{self.int_bits}"

        def border_set(call):
            call.expect(1)
            self.big_endian = call.choice(0, ("NORMal", "SWAPped")) == "NORMal"

        def border_q(call):
            call.expect(0)
            return "NORM" if self.big_endian else "SWAP"

        t.add("FORMat[:DATA]", set=fmt_set, query=fmt_q)
        t.add("FORMat:BORDer", set=border_set, query=border_q)

        def trace_q(call):
            rec, ch = self._record(call)
            if self.fmt == "ASCii":
                key = (ch, "ASC")
                if key not in rec.cache:
                    text = ",".join(np.char.mod("%.6E", rec.volts(ch)).tolist())
                    rec.cache[key] = memoryview(text.encode("ascii"))
                return self.send_block(rec.cache[key])
            return self.send_block(self._encoded(rec, ch))

        def scaling_q(call):
            rec, ch = self._record(call)
            n = rec.codes[ch].size
            dy = rec.dy_v[ch] / (256 if (self.fmt == "INTeger" and self.int_bits == 16) else 1)
            return ",".join((format_nr1(n), format_nr3(rec.dt_s), format_nr3(rec.t0_s),
                             format_nr3(dy), format_nr3(rec.y0_v[ch])))

        def clipped_q(call):
            rec, ch = self._record(call)
            return format_nr1(rec.clipped(ch))

        t.add("TRACe[:DATA]", query=trace_q)
        t.add("TRACe:SCALing", query=scaling_q)
        t.add("TRACe:CLIPped", query=clipped_q)

        def fetch(kind):
            def handler(call):
                ch = suffix_in(call, self.CHANNELS)
                call.expect(0)
                rec = b.latest_record()
                if rec is None:
                    raise ScpiError(-230, "no record acquired yet")
                if rec.codes[ch].size == 0:
                    raise ScpiError(-221, f"channel {ch} was off in the last record")
                v = rec.volts(ch)
                if kind == "ptp":
                    return format_nr3(float(v.max() - v.min()))
                if kind == "rms":
                    return format_nr3(float(np.sqrt(np.mean(v * v))))
                return format_nr3(mean_crossing_freq(v, rec.dt_s))
            return handler

        t.add("FETCh#:VOLTage:PTPeak", query=fetch("ptp"))
        t.add("FETCh#:VOLTage:RMS", query=fetch("rms"))
        t.add("FETCh#:FREQuency", query=fetch("freq"))


def _channel_param(call) -> int:
    call.expect(1)
    tok = call.params[0].strip().upper()
    call.has(0)
    for prefix in ("CHANNEL", "CHAN", "CH"):
        if tok.startswith(prefix) and tok[len(prefix):].isdigit():
            n = int(tok[len(prefix):])
            if n in ScopeInstrument.CHANNELS:
                return n
            raise ScpiError(-224, f"channel {n} (have 1, 2)")
    raise ScpiError(-224, f"channel expected (CH1, CH2), got {call.params[0][:20]}")


def _trigger_source(token: str) -> str:
    tok = token.strip().upper()
    if tok in ("IMM", "IMMEDIATE"):
        return "IMMediate"
    for prefix in ("INTERNAL", "INT"):
        if tok.startswith(prefix):
            rest = tok[len(prefix):] or "1"
            if rest in ("1", "2"):
                return f"INTernal{rest}"
    raise ScpiError(-224, f"trigger source {token[:20]} (IMMediate, INTernal1, INTernal2)")


def mean_crossing_freq(v: np.ndarray, dt_s: float) -> float:
    """Frequency from rising crossings of the mean with 10 % hysteresis, Hz (NaN -> 9.91E37)."""
    if v.size < 4:
        return NAN_VALUE
    mid = float(v.mean())
    hyst = 0.1 * float(v.max() - v.min())
    if hyst <= 0:
        return NAN_VALUE
    low = v < mid - hyst / 2
    high = v > mid + hyst / 2
    state = np.where(high, 1, np.where(low, -1, 0))
    idx = np.where(state != 0, np.arange(v.size), 0)
    np.maximum.accumulate(idx, out=idx)
    armed = state[idx]
    rise = np.flatnonzero((armed[:-1] < 0) & (armed[1:] > 0)) + 1
    if rise.size < 2:
        return NAN_VALUE
    # the mean crossing just before each rising event, interpolated
    raw = np.flatnonzero((v[:-1] < mid) & (v[1:] >= mid))
    k = np.searchsorted(raw, rise, side="right") - 1
    k = k[k >= 0]
    if k.size < 2:
        return NAN_VALUE
    j = raw[k]
    frac = (mid - v[j]) / (v[j + 1] - v[j])
    times = (j + frac) * dt_s
    span = float(times[-1] - times[0])
    if span <= 0 or not math.isfinite(span):
        return NAN_VALUE
    return (times.size - 1) / span
