"""Measurement and characterisation analysis: pure numpy/scipy estimators, no I/O.

Every estimate carries a standard uncertainty; results are frozen dataclasses with the
unit in each field name. Errors are :class:`benchctl.errors.MeasurementError` (a record
cannot give the estimate) or ``ValueError`` (a bad option).

Waveforms (:mod:`benchctl.analysis.waveform`)
    fit_sine            IEEE 1057 three-/four-parameter sine fit -> SineFit
    SineFit             amplitude, Vpp = 2A, frequency, phase, offset, residual, uncertainties
    vpp_robust          peak-to-peak from two quantiles (robust record statistics) -> Estimate
    rms                 RMS (total or AC) of a record -> Estimate
    dc                  mean of a record -> Estimate
    frequency           fundamental frequency from the four-parameter fit -> Estimate
    refuse_if_clipped   raise MeasurementError for a clipped record
    measure_amplitude   clip-checked Vpp by "fit" (default) or "robust" -> AmplitudeMeasurement
    AmplitudeMeasurement  Vpp, frequency, offset with uncertainties and the method used
    Estimate            value, u, unit, method
Spectrum (:mod:`benchctl.analysis.spectrum`)
    harmonics           harmonics, THD, SNR, SINAD, ENOB (IEEE 1241) -> HarmonicAnalysis
    HarmonicAnalysis    the harmonic amplitudes and figures, with uncertainties
    detect_oscillation  oscillating or not, with its evidence -> Detection
    Detection           verdict, SNR, peak prominence, frequency, in-band flag, reason
Envelope and AM (:mod:`benchctl.analysis.envelope`)
    envelope                    analytic-signal envelope of a record (ndarray, V)
    modulation_index_envelope   m = (Emax - Emin) / (Emax + Emin) -> ModulationIndex
    modulation_index_spectrum   m = (A_usb + A_lsb) / A_c -> ModulationIndex
    envelope_distortion         IEEE 1241 THD of the recovered envelope -> HarmonicAnalysis
    ModulationIndex             m, carrier, Emax/Emin, sideband asymmetry, method
Lines and the linear region (:mod:`benchctl.analysis.regression`)
    linear_fit          weighted least-squares line with standard errors -> LineFit
    LineFit             slope, intercept, standard errors, R^2, residual sd, dof
    linear_region       widest straight-line rail range within tolerance -> LinearRegion
    LinearRegion        range, supply sensitivity, INL, 95 % intervals
Thresholds (:mod:`benchctl.analysis.thresholds`)
    threshold_bracket   dropout/start-up voltage from bracketing observations -> Threshold
    threshold_logistic  50 % point of a logistic fit to noisy on/off data -> Threshold
    Threshold           value, interval, uncertainty, method
Datasheet statistics (:mod:`benchctl.analysis.datasheet`)
    min_typ_max         Min/Typ/Max over units (Typ = mean) -> MinTypMax
    MinTypMax           min, typ, max, sd, u_typ, n, definition of typ
    tolerance_factor    normal tolerance-interval factor k (Howe 1969, exact noncentral t)
    guard_band          guard-banded limits mean +/- k s -> GuardBand
    GuardBand           limits, mean, sd, k, coverage, confidence, method
"""

from benchctl.analysis._common import Estimate
from benchctl.analysis.datasheet import (
    GuardBand,
    MinTypMax,
    guard_band,
    min_typ_max,
    tolerance_factor,
)
from benchctl.analysis.envelope import (
    ModulationIndex,
    envelope,
    envelope_distortion,
    modulation_index_envelope,
    modulation_index_spectrum,
)
from benchctl.analysis.regression import LinearRegion, LineFit, linear_fit, linear_region
from benchctl.analysis.spectrum import Detection, HarmonicAnalysis, detect_oscillation, harmonics
from benchctl.analysis.thresholds import Threshold, threshold_bracket, threshold_logistic
from benchctl.analysis.waveform import (
    AmplitudeMeasurement,
    SineFit,
    dc,
    fit_sine,
    frequency,
    measure_amplitude,
    refuse_if_clipped,
    rms,
    vpp_robust,
)

__all__ = [
    "AmplitudeMeasurement",
    "Detection",
    "Estimate",
    "GuardBand",
    "HarmonicAnalysis",
    "LineFit",
    "LinearRegion",
    "MinTypMax",
    "ModulationIndex",
    "SineFit",
    "Threshold",
    "dc",
    "detect_oscillation",
    "envelope",
    "envelope_distortion",
    "fit_sine",
    "frequency",
    "guard_band",
    "harmonics",
    "linear_fit",
    "linear_region",
    "measure_amplitude",
    "min_typ_max",
    "modulation_index_envelope",
    "modulation_index_spectrum",
    "refuse_if_clipped",
    "rms",
    "threshold_bracket",
    "threshold_logistic",
    "tolerance_factor",
    "vpp_robust",
]
