"""ngspice reference harness: simulate a stage's netlist in batch mode and measure it.

Every function takes (topology, parts, model, conditions) as optimizer.netlist.spice_netlist
does and returns floats in SI units. Each call runs ``ngspice -b`` once or a few times on a
netlist from optimizer.netlist with a ``.control`` block that prints scalars (``name = value``
lines, 12 digits) or writes waveforms with ``wrdata`` into a temporary directory.
A failed run raises SpiceError carrying the netlist and ngspice's output.
"""

from __future__ import annotations

import math
import re
import shutil
import subprocess
import tempfile
from collections.abc import Callable, Mapping
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np

from optimizer.netlist import mid_band_frequency, nominal_temperature, rail_nodes, spice_netlist

NGSPICE = shutil.which("ngspice")
TIMEOUT_S = 60.0
_FAILED = re.compile(
    r"^\s*error|simulation interrupted|could not find|singular matrix|"
    r"timestep too small",
    re.IGNORECASE | re.MULTILINE,
)
_SCALAR = re.compile(r"^\s*([A-Za-z_][\w]*)\s*=\s*([-+0-9.eE]+|nan|inf)\s*$", re.MULTILINE)


class SpiceError(RuntimeError):
    """ngspice failed or did not print what the harness asked for."""


def _netlist(
    topology: str, parts: Mapping[str, float], model: Mapping[str, Any], conditions: Any, **kwargs: Any
) -> str:
    """spice_netlist of the stage; ``model`` may carry the device's "polarity" ("npn" when absent)
    beside its SPICE keys, so a PNP stage is written with a PNP model and mirrored rails."""
    card = {k: v for k, v in model.items() if k != "polarity"}
    return spice_netlist(topology, parts, card, conditions, polarity=str(model.get("polarity", "npn")), **kwargs)


def _rails(model: Mapping[str, Any], conditions: Any) -> list[str]:
    """The supply sources of the netlist (not ground): 'vcc' (positive rail) and/or 'vee' (negative)."""
    found = rail_nodes(
        float(conditions.supply), str(model.get("polarity", "npn")), float(getattr(conditions, "below_ground", 0.0))
    ).values()
    return sorted({name for name, _ in found if name != "0"})


def ngspice_available() -> bool:
    """True when an ngspice executable is on PATH."""
    return NGSPICE is not None


def _simulate(
    topology: str,
    parts: Mapping[str, float],
    model: Mapping[str, float],
    conditions: Any,
    control: str,
    *,
    elements: str = "",
    waveforms: tuple[str, ...] = (),
    amplitude: float = 0.01,
    frequency: float | None = None,
    transform: Callable[[str], str] | None = None,
) -> tuple[dict[str, float], dict[str, np.ndarray]]:
    """Run one netlist with ``control`` (``{dir}`` = output directory) in ngspice.

    ``transform`` (netlist text -> netlist text) edits the circuit before the run. Returns
    the printed scalars and the arrays of each ``{dir}/<name>.txt`` in ``waveforms``.
    """
    if NGSPICE is None:
        raise SpiceError("ngspice not installed: apt-get install ngspice")
    with tempfile.TemporaryDirectory(prefix="stagefit-spice-") as tmp:
        body = control.replace("{dir}", tmp)
        analyses = f"{elements}\n.control\nset noaskquit\nset numdgt=12\n{body}\nquit\n.endc"
        netlist = _netlist(
            topology, parts, model, conditions, analyses=analyses, amplitude=amplitude, frequency=frequency
        )
        if transform is not None:
            netlist = transform(netlist)
        path = Path(tmp) / "stage.cir"
        path.write_text(netlist)
        try:
            run = subprocess.run([NGSPICE, "-b", str(path)], capture_output=True, text=True, timeout=TIMEOUT_S, cwd=tmp)
        except subprocess.TimeoutExpired as exc:
            raise SpiceError(f"ngspice timed out after {TIMEOUT_S} s\n{netlist}") from exc
        if run.returncode != 0 or _FAILED.search(run.stdout + run.stderr):
            raise SpiceError(_failure(run, netlist, f"exit code {run.returncode}"))
        scalars = {name: float(value) for name, value in _SCALAR.findall(run.stdout)}
        try:
            arrays = {name: np.loadtxt(Path(tmp) / f"{name}.txt", ndmin=2) for name in waveforms}
        except OSError as exc:
            raise SpiceError(_failure(run, netlist, f"missing output {exc}")) from exc
    return scalars, arrays


def _failure(run: subprocess.CompletedProcess, netlist: str, why: str) -> str:
    return (
        f"ngspice failed ({why})\n--- stderr ---\n{run.stderr[-3000:]}\n"
        f"--- stdout ---\n{run.stdout[-3000:]}\n--- netlist ---\n{netlist}"
    )


def _need(scalars: Mapping[str, float], *names: str) -> list[float]:
    missing = [n for n in names if n not in scalars]
    if missing:
        raise SpiceError(f"ngspice did not report {missing}; got {sorted(scalars)}")
    return [scalars[n] for n in names]


def _ammeters(netlist: str) -> str:
    """The netlist with a 0 V source in series with each transistor's collector (Vam_q1 ...):
    the collector current is read as that branch's current. ngspice's device report @q1[ic] can
    disagree with the converged node voltages (on an emitter follower with a 1.4 Mohm base it
    differed from the branch current, and from KCL at the supply, by 3 %)."""
    lines = []
    for line in netlist.splitlines():
        fields = line.split()
        if len(fields) >= 5 and fields[0][:1].lower() == "q":  # Qname collector base emitter model
            name, collector = fields[0].lower(), fields[1]
            lines.append(f"Vam_{name} {collector} am_{name} DC 0")
            line = " ".join([fields[0], f"am_{name}", *fields[2:]])
        lines.append(line)
    return "\n".join(lines) + "\n"


def spice_operating_point(
    topology: str, parts: Mapping[str, float], model: Mapping[str, float], conditions: Any
) -> dict[str, float]:
    """DC operating point: ic (A, q1; ic2 for q2 of a two-transistor stage, each read by an
    ammeter in the collector), v_base, v_collector, v_emitter (V to ground, those of the stage's
    nodes) and supply_current (A drawn from the positive rail, or sunk by the negative rail when there
    is no positive one; ic is the collector current's magnitude: a PNP's flows out of its collector); of a JFET stage: ic (A, j1's drain current),
    v_gate, v_source, v_drain and supply_current."""
    from optimizer.topologies import get_topology

    stage = get_topology(topology)
    drawn = "-i(vcc)" if "vcc" in _rails(model, conditions) else "i(vee)"  # a negative rail alone: what it sinks
    if stage.device_kind == "jfet":  # id of j1 as "ic", its nodes by their own names
        drain = next(d for role, d, _, _ in stage.transistor_pins if role == "q1")
        control = (
            "op\nlet ic = @j1[id]\nlet v_gate = v(gate)\nlet v_source = v(source)\n"
            f"let v_drain = v({drain})\nlet supply_current = -i(vcc)\n"
            "print ic v_gate v_source v_drain supply_current"
        )
        scalars, _ = _simulate(topology, parts, model, conditions, control)
        names = ("ic", "v_gate", "v_source", "v_drain", "supply_current")
        return dict(zip(names, _need(scalars, *names)))
    follower = stage.transistors == 2
    nodes = tuple(
        n for n in ("base", "collector", "emitter") if n in stage.node_voltages
    )  # a follower has no collector
    control = (
        "op\nlet ic = abs(i(vam_q1))\n"
        + "".join(f"let v_{n} = v({n})\n" for n in nodes)
        + f"let supply_current = {drawn}\n"
        + ("let ic2 = abs(i(vam_q2))\nprint ic2\n" if follower else "")
        + f"print ic {' '.join(f'v_{n}' for n in nodes)} supply_current"
    )
    scalars, _ = _simulate(topology, parts, model, conditions, control, transform=_ammeters)
    names = ("ic", *(f"v_{n}" for n in nodes), "supply_current") + (("ic2",) if follower else ())
    return dict(zip(names, _need(scalars, *names)))


def _complex_gain(
    topology: str, parts: Mapping[str, float], model: Mapping[str, float], conditions: Any, frequency: float
) -> tuple[complex, float]:
    """V(out)/V(sig) and |V(src)/I(Rs)| (ohm) from a one-point .ac at ``frequency`` Hz."""
    control = (
        f"ac lin 1 {frequency!r} {frequency!r}\nlet h = v(out)/v(sig)\n"
        "let g_re = real(h)\nlet g_im = imag(h)\nlet zin = mag(v(src)/(-i(vsig)))\n"
        "print g_re g_im zin"
    )
    scalars, _ = _simulate(topology, parts, model, conditions, control)
    g_re, g_im, zin = _need(scalars, "g_re", "g_im", "zin")
    return complex(g_re, g_im), zin


def spice_midband(
    topology: str, parts: Mapping[str, float], model: Mapping[str, float], conditions: Any
) -> dict[str, float]:
    """Mid-band (band's geometric mean) small-signal figures from .ac.

    gain: V(out)/V(sig) as a signed real, |H| with the sign of Re(H) (V/V);
    input_impedance: |V(src)/I(Rs)|, looking from after the source resistance (ohm);
    output_impedance: |V(out)| with a 1 A AC current into 'out', Vsig's AC zeroed and the
    load (RL and CL) removed (ohm).
    """
    frequency = mid_band_frequency(conditions)
    h, zin = _complex_gain(topology, parts, model, conditions, frequency)
    unloaded = SimpleNamespace(
        supply=conditions.supply,
        source_impedance=conditions.source_impedance,
        load_impedance=math.inf,
        load_capacitance=0.0,
        temperature=conditions.temperature,
        band=conditions.band,
        below_ground=getattr(conditions, "below_ground", 0.0),
    )
    control = f"alter @vsig[acmag] = 0\nac lin 1 {frequency!r} {frequency!r}\nlet zout = mag(v(out))\nprint zout"
    scalars, _ = _simulate(topology, parts, model, unloaded, control, elements="Itest 0 out DC 0 AC 1")
    (zout,) = _need(scalars, "zout")
    return {"gain": math.copysign(abs(h), h.real), "input_impedance": zin, "output_impedance": zout}


def _crossing(f: np.ndarray, mag: np.ndarray, level: float) -> float:
    """First frequency along ``f`` where ``mag`` falls below ``level``, log-interpolated (Hz)."""
    below = np.nonzero(mag < level)[0]
    if below.size == 0:
        return math.nan
    i = below[0]
    if i == 0:
        return float(f[0])
    x0, x1 = np.log(f[i - 1]), np.log(f[i])
    y0, y1 = np.log(mag[i - 1]), np.log(mag[i])
    return float(np.exp(x0 + (np.log(level) - y0) * (x1 - x0) / (y1 - y0)))


def spice_response(
    topology: str, parts: Mapping[str, float], model: Mapping[str, float], conditions: Any
) -> dict[str, float]:
    """-3 dB corners f_low, f_high (Hz) of |V(out)/V(sig)| relative to its value at the band's
    geometric mean, from .ac dec 100 over 0.01 Hz..1 GHz (nan if no corner in that range)."""
    control = "ac dec 100 0.01 1e9\nlet h = mag(v(out)/v(sig))\nwrdata {dir}/h.txt h"
    _, arrays = _simulate(topology, parts, model, conditions, control, waveforms=("h",))
    f, mag = arrays["h"][:, 0], arrays["h"][:, 1]
    fm = mid_band_frequency(conditions)
    ref = float(np.exp(np.interp(np.log(fm), np.log(f), np.log(mag))))
    above, below = f >= fm, f <= fm
    level = ref / math.sqrt(2.0)
    return {
        "f_low": _crossing(f[below][::-1], mag[below][::-1], level),
        "f_high": _crossing(f[above], mag[above], level),
    }


# Swing: the clip level as DESIGN.md defines it (the AC load line, coupling and bypass
# capacitors holding their DC) is measured on the static transfer curve, not on a transient.
# Why not a transient with a growing sine: at the clip itself the bias does not move (below
# clipping the mean output stays within a few mV), but a curvature test over a window of a
# sampled peak only sees a soft clip - a degenerated stage whose saturated collector then
# follows its emitter in phase, as in feedback_ce - some cycles after the peak has flattened,
# and by then the saturation's base current has recharged c_in and c_out (the output's mean
# moved 0.2 V on feedback_ce-9V-A4-hfe400), so the transient read the peak-to-peak of a
# stage already past the clip with a shifted bias, 10-15 % above the clip level.


def _held(element: str) -> bool:
    """A stage capacitor (C1, C2, ...: coupling and bypass, held at its DC), not the load's."""
    return element[:1].lower() == "c" and element.lower() != "cload"


_SWEEP_POINTS = 6001  # over +-1.5*supply/|gain| at the source: ~0.05 % of the supply per step at the load
_CLIP_GAIN_FRACTION = 0.5  # clipping starts where the incremental gain falls below this share


def _hold_capacitors(netlist: str, node_voltages: Mapping[str, float]) -> str:
    """The netlist with each coupling/bypass capacitor replaced by a DC source of its voltage."""
    lines = []
    for line in netlist.splitlines():
        fields = line.split()
        if fields and _held(fields[0]):
            name, a, b = fields[:3]
            drop = node_voltages.get(a, 0.0) - node_voltages.get(b, 0.0)
            line = f"Vhold_{name[1:]} {a} {b} DC {drop!r}"
        lines.append(line)
    return "\n".join(lines) + "\n"


def _capacitor_nodes(netlist: str) -> set[str]:
    return {
        node for line in netlist.splitlines() if (f := line.split()) and _held(f[0]) for node in f[1:3] if node != "0"
    }


def held_transfer(
    topology: str, parts: Mapping[str, float], model: Mapping[str, float], conditions: Any
) -> tuple[np.ndarray, np.ndarray, complex]:
    """Static transfer curve (source EMF V, load V) with the capacitors holding their DC, and
    the mid-band .ac gain.

    An operating point gives the DC across every coupling and bypass capacitor; each is then
    replaced by a voltage source holding that DC (what the capacitors do over a period at
    mid-band), and a DC sweep of the signal source over +-1.5*supply/|gain| gives the load
    voltage against the source EMF.
    """
    netlist = _netlist(topology, parts, model, conditions)
    nodes = sorted(_capacitor_nodes(netlist))
    control = "op\n" + "".join(f"let n_{n} = v({n})\nprint n_{n}\n" for n in nodes)
    scalars, _ = _simulate(topology, parts, model, conditions, control)
    voltages = dict(zip(nodes, _need(scalars, *(f"n_{n}" for n in nodes))))
    h, _ = _complex_gain(topology, parts, model, conditions, mid_band_frequency(conditions))
    span = 1.5 * float(conditions.supply) / abs(h)
    control = f"dc vsig {-span!r} {span!r} {2.0 * span / (_SWEEP_POINTS - 1)!r}\nwrdata {{dir}}/d.txt v(out)"
    _, arrays = _simulate(
        topology,
        parts,
        model,
        conditions,
        control,
        waveforms=("d",),
        transform=lambda text: _hold_capacitors(text, voltages),
    )
    return arrays["d"][:, 0], arrays["d"][:, 1], h


def spice_clip(topology: str, parts: Mapping[str, float], model: Mapping[str, float], conditions: Any) -> float:
    """Hard clip level at the load, V peak-to-peak, on the static transfer curve (:func:`clip_of`)."""
    v_in, v_out, _ = held_transfer(topology, parts, model, conditions)
    return clip_of(topology, v_in, v_out, float(conditions.supply))


def clip_of(topology: str, v_in: np.ndarray, v_out: np.ndarray, supply: float) -> float:
    """Clip level (V peak-to-peak) of a held-capacitor transfer curve.

    Clipping starts at the smallest input, of either polarity, where the incremental gain
    dVout/dVsig has fallen below half its value at the operating point (or changed sign);
    the clip level is the output's peak-to-peak for an input sine of that amplitude, read
    off the curve. A hard clip flattens the curve at once, so this is the AC-load-line clip
    level of the models (clip_vpp); a softly compressing side (degenerated cutoff)
    contributes the level it has reached by then.
    """
    slope = np.gradient(v_out, v_in)
    centre = int(np.argmin(np.abs(v_in)))
    clipped = slope / slope[centre] < _CLIP_GAIN_FRACTION
    right = np.nonzero(clipped[centre:])[0]
    left = np.nonzero(clipped[: centre + 1])[0]
    if right.size == 0 or left.size == 0:
        raise SpiceError(f"{topology}: no clipping found up to an output of {supply} V")
    amplitude = min(v_in[centre + right[0]], -v_in[left[-1]])
    return float(abs(np.interp(amplitude, v_in, v_out) - np.interp(-amplitude, v_in, v_out)))


def spice_swing(topology: str, parts: Mapping[str, float], model: Mapping[str, float], conditions: Any) -> float:
    """Usable swing at the load, V peak-to-peak, by the 10 % rule (:func:`swing_of`)."""
    v_in, v_out, h = held_transfer(topology, parts, model, conditions)
    return swing_of(topology, v_in, v_out, h)


def swing_of(topology: str, v_in: np.ndarray, v_out: np.ndarray, h: complex, tolerance: float = 0.1) -> float:
    """Usable swing (V peak-to-peak, the models' swing_vpp) of a held-capacitor transfer curve.

    The output peaks of a sine of amplitude a at the source are the curve at +a and -a (less
    the quiescent output); the swing is the peak-to-peak at the smallest a where either peak
    deviates by more than ``tolerance`` from the linear mid-band gain h (the .ac gain, signed
    by its real part) times +-a, interpolated linearly between sweep points.
    """
    gain = math.copysign(abs(h), h.real)
    centre = int(np.argmin(np.abs(v_in)))
    q = np.interp(0.0, v_in, v_out)
    a = v_in[centre + 1 :]
    up = np.interp(a, v_in, v_out) - q
    down = np.interp(-a, v_in, v_out) - q
    dev = np.maximum(np.abs(up / (gain * a) - 1.0), np.abs(down / (-gain * a) - 1.0)) - tolerance
    ignore = a < 1e-3 * a[-1]  # the curve's own rounding swamps the ratio at the smallest drives
    over = np.nonzero((dev > 0.0) & ~ignore)[0]
    if over.size == 0:
        raise SpiceError(f"{topology}: no {tolerance:.0%} deviation found up to a drive of {a[-1]} V")
    i = over[0]
    w = -dev[i - 1] / (dev[i] - dev[i - 1])
    pp = np.abs(up - down)
    return float(pp[i - 1] + w * (pp[i] - pp[i - 1]))


def spice_noise(
    topology: str, parts: Mapping[str, float], model: Mapping[str, float], conditions: Any, elements: str = ""
) -> float:
    """Equivalent input noise over the band, V rms, referred to the source EMF (Vsig), without
    the source resistance's own noise (Rsource made noiseless), from .noise dec 50; ``elements``
    are added to the netlist."""
    low, high = conditions.band
    control = (
        f"alter @rsource[noisy] = 0\nnoise v(out) vsig dec 50 {float(low)!r} {float(high)!r}\n"
        "let ein = inoise_total\nprint ein"
    )
    scalars, _ = _simulate(topology, parts, model, conditions, control, elements=elements)
    (ein,) = _need(scalars, "ein")
    return ein


_THD_SETTLE, _THD_CYCLES, _THD_SAMPLES, _THD_HARMONICS = 4, 8, 256, 9


def _thd_run(
    topology: str,
    parts: Mapping[str, float],
    model: Mapping[str, float],
    conditions: Any,
    amplitude: float,
    frequency: float,
) -> tuple[float, float]:
    """(output Vpp, THD fraction of harmonics 2..9) of the last _THD_CYCLES cycles."""
    period = 1.0 / frequency
    step = period / _THD_SAMPLES
    stop = (_THD_SETTLE + _THD_CYCLES) * period
    control = f"option reltol=1e-5\ntran {step!r} {stop!r} 0 {step!r}\nlinearize v(out)\nwrdata {{dir}}/o.txt v(out)"
    _, arrays = _simulate(
        topology, parts, model, conditions, control, waveforms=("o",), amplitude=amplitude, frequency=frequency
    )
    v = arrays["o"][-_THD_CYCLES * _THD_SAMPLES :, 1]
    # Hann window over whole cycles: each harmonic sits on bins n*C-1..n*C+1, and the
    # slow settling of the coupling capacitors stays in bins 0..1.
    spectrum = np.abs(np.fft.rfft((v - v.mean()) * np.hanning(v.size + 1)[:-1])) ** 2
    c = _THD_CYCLES
    power = [spectrum[n * c - 1 : n * c + 2].sum() for n in range(1, _THD_HARMONICS + 1)]
    return float(v.max() - v.min()), float(math.sqrt(sum(power[1:]) / power[0]))


def spice_thd(
    topology: str,
    parts: Mapping[str, float],
    model: Mapping[str, float],
    conditions: Any,
    vpp_out: float,
    *,
    frequency: float = 1000.0,
) -> float:
    """THD (fraction, harmonics 2..9) of the load voltage at ~``vpp_out`` V peak-to-peak at
    ``frequency`` Hz: a transient from the operating point, 4 settling then 8 measured cycles;
    the input is set from the .ac gain, then rescaled once from the measured output Vpp."""
    h, _ = _complex_gain(topology, parts, model, conditions, frequency)
    amplitude = 0.5 * vpp_out / abs(h)
    vpp, thd = _thd_run(topology, parts, model, conditions, amplitude, frequency)
    if abs(vpp / vpp_out - 1.0) > 0.02:
        vpp, thd = _thd_run(topology, parts, model, conditions, amplitude * vpp_out / vpp, frequency)
    return thd


def spice_psrr(
    topology: str,
    parts: Mapping[str, float],
    model: Mapping[str, float],
    conditions: Any,
    frequencies: tuple[float, ...],
) -> list[float]:
    """Supply rejection 20*log10(1/|V(out)/V(rail)|) (dB) at each frequency (Hz), from .ac with
    AC 1 on one supply source (Vcc, or Vee on a negative rail) and the signal source's AC set to 0
    (its resistance stays); with two rails (a split supply) each in turn, the worse counting."""
    worst: list[float] | None = None
    for rail in _rails(model, conditions):
        control = f"alter @vsig[acmag] = 0\nalter @v{rail[1:]}[acmag] = 1\n"
        for i, f in enumerate(frequencies):
            control += f"ac lin 1 {float(f)!r} {float(f)!r}\nlet r{i} = -20*log10(mag(v(out)/v({rail})))\nprint r{i}\n"
        scalars, _ = _simulate(topology, parts, model, conditions, control)
        found = _need(scalars, *(f"r{i}" for i in range(len(frequencies))))
        worst = found if worst is None else [min(a, b) for a, b in zip(worst, found)]
    return worst


NF_REFERENCE_K = 290.0  # K, the standard noise-figure source temperature


def spice_noise_figure(topology: str, parts: Mapping[str, float], model: Mapping[str, float], conditions: Any) -> float:
    """Noise figure (dB) over the band referred to a source at the standard 290 K, the stage at
    the circuit temperature T: 10*log10(1 + stage/(source * 290 K/T)) of input-referred noise
    powers integrated by .noise, the source's own from a run with Rsource noisy (total - stage;
    ngspice 39 puts every resistor's thermal noise at the circuit temperature, ignoring an
    instance ``temp``, so the source's power, exactly proportional to T, is scaled to 290 K),
    the stage alone from :func:`spice_noise` (Rsource noiseless)."""
    low, high = conditions.band
    control = f"noise v(out) vsig dec 50 {float(low)!r} {float(high)!r}\nlet total = inoise_total\nprint total"
    scalars, _ = _simulate(topology, parts, model, conditions, control)
    (total,) = _need(scalars, "total")
    stage = spice_noise(topology, parts, model, conditions)
    source_290k = (total**2 - stage**2) * NF_REFERENCE_K / (nominal_temperature(conditions) + 273.15)
    return 10.0 * math.log10(1.0 + stage**2 / source_290k)


# ---- loop gain of an overall feedback loop (feedback_pair) --------------------------------


def spice_loop_gain(
    topology: str,
    parts: Mapping[str, float],
    model: Mapping[str, float],
    conditions: Any,
    feedback_role: str = "r_feedback",
    node: str = "emitter",
    points_per_decade: int = 50,
) -> tuple[np.ndarray, np.ndarray]:
    """Loop gain T(f) (complex) by double injection (voltage and current, after Middlebrook),
    at the end of ``feedback_role`` that meets ``node``; frequencies (Hz) 1 Hz..10 GHz.

    The loop is opened nowhere: a 0 V source Vinj is put in series between ``node`` (X, the side
    the loop drives forward) and the feedback resistor's end (Y, the side it returns on), and a
    current source Iinj feeds X. Run 1, Vinj AC 1: Tv = -V(Y)/V(X). Run 2, Iinj AC 1 into X: with
    i(Vinj) the current from X to Y, Ti = i(Vinj)/(1 - i(Vinj)). Then
    T = (Tv*Ti - 1)/(Tv + Ti + 2), exact for a single loop whatever the loading at the break.
    The signal source's AC is zero in both runs (its resistance stays)."""
    from optimizer.netlist import designators

    ref = designators(topology, parts)[feedback_role]

    def split(text: str) -> str:
        lines = []
        for line in text.splitlines():
            fields = line.split()
            if fields and fields[0] == ref:
                fields = [fields[0]] + ["fbk" if n == node else n for n in fields[1:3]] + fields[3:]
                line = " ".join(fields) + f"\nVinj {node} fbk DC 0 AC 1\nIinj 0 {node} DC 0 AC 0"
            lines.append(line)
        return "\n".join(lines) + "\n"

    sweep = f"ac dec {points_per_decade} 1 1e10\n"
    control = (
        "alter @vsig[acmag] = 0\n"
        + sweep
        + f"let tv = -v(fbk)/v({node})\nlet tvr = real(tv)\nlet tvi = imag(tv)\nwrdata {{dir}}/tv.txt tvr tvi\n"
        "alter @vinj[acmag] = 0\nalter @iinj[acmag] = 1\n"
        + sweep
        + "let ti = i(vinj)/(1 - i(vinj))\nlet tir = real(ti)\nlet tii = imag(ti)\nwrdata {dir}/ti.txt tir tii"
    )
    _, arrays = _simulate(topology, parts, model, conditions, control, waveforms=("tv", "ti"), transform=split)
    tv, ti = arrays["tv"], arrays["ti"]
    f = tv[:, 0]
    tv_c = tv[:, 1] + 1j * tv[:, 3]
    ti_c = ti[:, 1] + 1j * ti[:, 3]
    return f, (tv_c * ti_c - 1.0) / (tv_c + ti_c + 2.0)


def phase_margin_of(f: np.ndarray, t: np.ndarray, reference: float) -> float:
    """Phase margin (degrees) of a loop gain T(f): 180 + the phase of T (unwrapped from the
    mid-band ``reference`` frequency, Hz, where T is near a positive real) at the first unity
    crossing above it, log-interpolated; 180 if |T| never reaches 1 from above."""
    start = int(np.searchsorted(f, reference))
    mag = np.abs(t[start:])
    phase = np.degrees(np.unwrap(np.angle(t[start:])))
    below = np.nonzero(mag < 1.0)[0]
    if mag[0] <= 1.0 or below.size == 0:
        return 180.0
    i = below[0]
    w = np.log(mag[i - 1]) / (np.log(mag[i - 1]) - np.log(mag[i]))
    return float(180.0 + phase[i - 1] + w * (phase[i] - phase[i - 1]))
