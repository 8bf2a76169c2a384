"""Capacitor sizing after the resistors: the smallest series values that keep the
whole stage's low -3 dB point at or below the spec, found jointly for all capacitors.

Each capacitor alone sets a corner f_j = K_j / C_j (K_j found numerically from the
stage's own response with the other capacitors made very large). The capacitors are
then scaled together, C_j = m * K_j / f_target, with the smallest common factor m that
still meets the target once every value is rounded up to the series; a last pass steps
each capacitor down one value where the target still holds. Whether a set of values meets
the target is read from the response at the target frequency alone (within 3 dB of the
mid-band gain), not from the crossing's search. Last, a capacitor that alone costs more than
MIDBAND_LOSS / (capacitors) of |H| at the band's centre is raised to the smallest value that
does not (the mid-band figures take every capacitor as a short there), and where the spec limits
the output impedance, c_out is raised until its reactance at the band's centre (at its low
tolerance edge) keeps the impedance the load sees within the limit: into a high-impedance load
the low corner alone leaves c_out small, its reactance then the larger part of the output
impedance. All candidates at once.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

import numpy as np

from optimizer.devices import AnyDevice
from optimizer.physics import SWEEP, low_3db_corner
from optimizer.topologies.base import (
    CHUNK_FULL,
    Bias,
    Conditions,
    Parts,
    Topology,
    _source_resistance,
    frame_conditions,
)

_LARGE_CAPACITANCE = 1.0  # F: "a short" at audio frequencies for the corner probe
MIDBAND_LOSS = 0.01  # the capacitors together may cost at most this share of |H| at the band's centre
_PROBE_VALUES = (1e-6, 1e-8, 1e-10, 1e-4)  # F, tried in turn for each capacitor's own corner
_SCALE_GRID = np.geomspace(1.0, 16.0, 25)  # common factors m tried, ascending
PROBE_BATCH = 1024  # variants up to which every probe left after the first is solved in one call


class _LowCorner:
    """The stage's f_low (Hz) for capacitor variants of fixed candidates: the same values as
    ``evaluate(full=True).metrics["f_low"]`` of each variant, computed alone. The capacitors
    leave the bias alone (open at DC; a held c_in keeps its value in every variant), so it is
    solved once for the candidates; each variant takes its candidate's bias, then the mid-band
    gain as the reference and the low crossing of the nodal response (no swing, f_high, noise,
    supply rejection or ratings). The mid-band gain of a stage whose mid-band figures do not see
    its capacitors (``Topology.core_is_bound``; a follower's see c_in and c_out at the band's
    centre) is solved once for the candidates too, each variant taking its candidate's."""

    def __init__(
        self, topology: Topology, parts: dict[str, np.ndarray], device: AnyDevice, conditions: Conditions
    ) -> None:
        self.topology, self.conditions = topology, frame_conditions(conditions, device)
        p = topology.check_parts(parts, self.conditions)
        beta = topology._hfe_array(device, None, next(iter(p.values())).size)
        self.parts, self.bias, _ = topology._solve(p, device, self.conditions, beta)
        self.gain: np.ndarray | None = None  # V/V, per candidate where the capacitors leave it alone
        if topology.core_is_bound:
            every = np.arange(beta.size)
            self.gain = np.concatenate(
                [self._chunk(every[i : i + CHUNK_FULL], {})[0] for i in range(0, beta.size, CHUNK_FULL)]
            )

    def _chunk(self, at: np.ndarray, caps: dict[str, np.ndarray]) -> tuple[np.ndarray, Parts, Bias, np.ndarray]:
        """Mid-band gain (V/V, taken from :attr:`gain` where solved), parts, bias and source resistance
        (ohm) of the candidates ``at`` with the capacitor values ``caps`` (F, one per variant)."""
        t, c, b = self.topology, self.conditions, self.bias
        p = {**{k: v[at] for k, v in self.parts.items()}, **caps}
        chunk = Bias({k: v[at] for k, v in b.op.items()}, [{k: v[at] for k, v in ss.items()} for ss in b.small_signal])
        r_source = _source_resistance(chunk, c)
        if self.gain is not None:
            return self.gain[at], p, chunk, r_source
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            return t._midband(p, c, chunk, r_source)["gain"], p, chunk, r_source

    def _responses(
        self, rows: np.ndarray, caps: dict[str, np.ndarray]
    ) -> Iterator[tuple[slice, np.ndarray, Callable[[np.ndarray], np.ndarray]]]:
        """(the variants' slice, their mid-band gain (V/V), their nodal response) in chunks of
        CHUNK_FULL variants: candidate ``rows[k]`` with the capacitor values (F) ``caps[c][k]``."""
        t, c = self.topology, self.conditions
        for i in range(0, rows.size, CHUNK_FULL):
            part = slice(i, i + CHUNK_FULL)
            gain, p, chunk, r_source = self._chunk(rows[part], {k: v[part] for k, v in caps.items()})
            net = t._network(p, c, chunk.small_signal, True, r_source, True)
            yield part, gain, t._response(net, r_source)

    def __call__(self, rows: np.ndarray, caps: dict[str, np.ndarray]) -> np.ndarray:
        """f_low (Hz) of the variants: candidate ``rows[k]`` with the capacitor values (F) ``caps[c][k]``."""
        out = np.empty(rows.size)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            for part, gain, response in self._responses(rows, caps):
                out[part] = low_3db_corner(response, gain)
        return out

    def meets(self, rows: np.ndarray, caps: dict[str, np.ndarray], target: float) -> np.ndarray:
        """Whether each variant (as :meth:`__call__`'s) has its f_low at or below ``target`` (Hz):
        its response at the target within 3 dB of the mid-band gain, |H|^2 >= gain^2/2. One
        nodal solve per variant instead of the crossing's search (about 16 frequencies).

        The same answer as ``self(rows, caps) <= target`` wherever the low skirt crosses -3 dB
        once below the band; it is exact where f_low lies within the crossing's tolerance
        (1e-4 decade) of the target. Where the model has no figure (NaN gain), True, as the
        crossing's search reports such a stage at the sweep's low end."""
        out = np.empty(rows.size, dtype=bool)
        at_target = np.array([[target]])
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            for part, gain, response in self._responses(rows, caps):
                h = response(at_target)[0]
                out[part] = ~(2.0 * (h.real**2 + h.imag**2) < gain**2)
        return out

    def at_centre(self, rows: np.ndarray, caps: dict[str, np.ndarray]) -> np.ndarray:
        """|H| (V/V) at the band's centre (the geometric mean of its edges) of each variant (as
        :meth:`__call__`'s); NaN where the model has no figure."""
        centre = np.array([[self.conditions.band_centre]])
        out = np.empty(rows.size)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            for part, _, response in self._responses(rows, caps):
                out[part] = np.abs(response(centre)[0])
        return out

    def output_impedance(self, caps: dict[str, np.ndarray]) -> np.ndarray:
        """The output impedance (ohm, complex) the load sees at the band's centre of every
        candidate with the capacitor values ``caps`` (F, per candidate) but c_out a short: the
        stage's own, to which c_out's reactance adds in series (as the full metrics solve it)."""
        n = self.bias.op["ic"].size
        shorted = {**caps, "c_out": np.full(n, _LARGE_CAPACITANCE)}
        out = np.empty(n, dtype=complex)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            for part, _, response in self._responses(np.arange(n), shorted):
                out[part] = self.topology.at_centre(response.network, self.conditions, 1.0 / response.drive)[2]
        return out

    def meets_stacked(self, variants: list[dict[str, np.ndarray]], target: float) -> np.ndarray:
        """:meth:`meets` of several capacitor variants of all the candidates: shape (variants, candidates)."""
        n = self.bias.op["ic"].size
        rows = np.tile(np.arange(n), len(variants))
        caps = {c: np.concatenate([np.broadcast_to(v[c], (n,)) for v in variants]) for c in variants[0]}
        return self.meets(rows, caps, target).reshape(len(variants), n)


def _round_up(values: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    """Index of the smallest allowed value >= each value (clipped to the largest)."""
    return np.minimum(np.searchsorted(allowed, values * (1 - 1e-9)), allowed.size - 1)


def size_capacitors(
    topology: Topology,
    resistors: dict[str, np.ndarray],
    device: AnyDevice,
    conditions: Conditions,
    allowed: np.ndarray,
    f_low_target: float | None = None,
    output_impedance_max: float | None = None,
    capacitor_low_edge: float = 1.0,
) -> dict[str, np.ndarray]:
    """Capacitor values (F) for every candidate, from the sorted ``allowed`` values.

    ``resistors`` maps role -> array over candidates (a capacitor given there is held at its
    value, not sized: c_in 0 of a direct-coupled input). The target defaults to the low
    edge of ``conditions.band``. Where even the largest values miss the target, the
    largest are returned (the scoring then reports the low corner as violated). Few
    batches of vectorised model calls: the corner probes, the common factors, one step-down per capacitor.
    ``output_impedance_max`` (ohm, the spec's limit at the band's centre): c_out at least the
    value that keeps it at ``capacitor_low_edge`` times its value (1 less its tolerance).
    """
    target = conditions.band[0] if f_low_target is None else f_low_target
    allowed = np.sort(np.asarray(allowed, dtype=float))
    size = np.broadcast(*resistors.values()).shape
    resistors = {r: np.broadcast_to(np.asarray(v, dtype=float), size) for r, v in resistors.items()}
    caps = tuple(c for c in topology.capacitors if c not in resistors)
    f_low = _LowCorner(
        topology, {**resistors, **{c: np.full(size, _LARGE_CAPACITANCE) for c in caps}}, device, conditions
    )

    corner_constant = {c: np.full(size, np.nan) for c in caps}
    f_smallest = {c: np.full(size, np.inf) for c in caps}  # f_low with the smallest probe (Hz)
    probes = list(_PROBE_VALUES)
    while probes:  # each capacitor's first probe whose corner lies inside the sweep
        pending = {c: np.flatnonzero(np.isnan(k)) for c, k in corner_constant.items()}
        pending = {c: rows for c, rows in pending.items() if rows.size}
        if not pending:
            break
        # one variant per pending (probe, capacitor, candidate): that capacitor at the probe, the others
        # large. The first probe finds most corners; the few variants left then take every probe left
        # in one call, the later probes' values counting only where the earlier ones found no corner
        # (the same values as a call per probe)
        rows = np.concatenate(list(pending.values()))
        first_probe = len(probes) == len(_PROBE_VALUES)
        batch = probes[:1] if first_probe or rows.size * len(probes) > PROBE_BATCH else probes
        probes = probes[len(batch) :]
        f_probe = f_low(
            np.tile(rows, len(batch)),
            {
                c: np.concatenate(
                    [
                        np.full(r.size, value if cap == c else _LARGE_CAPACITANCE)
                        for value in batch
                        for cap, r in pending.items()
                    ]
                )
                for c in caps
            },
        )
        start = 0
        for value in batch:
            for cap, rows in pending.items():
                f = f_probe[start : start + rows.size]
                start += rows.size
                open_ = np.isnan(corner_constant[cap][rows])  # still without a corner at the earlier probes
                f, rows = f[open_], rows[open_]
                if value == min(_PROBE_VALUES):
                    f_smallest[cap][rows] = f
                inside = (f > 2.0 * SWEEP[0]) & (f < 0.5 * SWEEP[1])
                corner_constant[cap][rows[inside]] = f[inside] * value
    # no corner inside the sweep at any probe: a capacitor that does not move the stage's low
    # corner (below the sweep even at the smallest probe) takes the smallest value, one whose
    # corner stays above it the largest
    for cap, k in corner_constant.items():
        unmoved = np.isnan(k) & (f_smallest[cap] <= 2.0 * SWEEP[0])
        k[unmoved] = 0.0
    corner_constant = {c: np.nan_to_num(k, nan=allowed[-1] * target) for c, k in corner_constant.items()}

    # the values of every common factor (factors, n) per capacitor; where a factor rounds every
    # capacitor to the same values as the factor before it takes that one's answer (not solved again)
    scaled = {c: _round_up(_SCALE_GRID[:, None] * corner_constant[c] / target, allowed) for c in caps}
    n = int(np.prod(size))
    new = np.zeros((_SCALE_GRID.size, n), dtype=bool)
    new[0] = True
    for idx in scaled.values():
        new[1:] |= idx[1:] != idx[:-1]
    which = np.flatnonzero(new)  # flat (factor, candidate) of the variants solved
    meets = np.empty(new.shape, dtype=bool)  # (scale factors, n)
    meets.flat[which] = f_low.meets(which % n, {c: allowed[idx.flat[which]] for c, idx in scaled.items()}, target)
    for i in range(1, _SCALE_GRID.size):
        meets[i] = np.where(new[i], meets[i], meets[i - 1])
    found = meets.any(axis=0)
    first = np.where(found, np.argmax(meets, axis=0), 0)
    best = {c: np.where(found, idx[first, np.arange(first.size)], allowed.size - 1) for c, idx in scaled.items()}

    # One step down each capacitor in turn, where the target still holds with the earlier steps
    # taken: every subset of capacitors stepped down is solved in one call, then the turns are
    # played on the results (the same outcome as one call per capacitor).
    subsets = range(1, 1 << len(caps))  # bit j: capacitor j one value lower
    lower = {c: np.maximum(best[c] - 1, 0) for c in caps}
    meets_sub = f_low.meets_stacked(
        [{c: allowed[lower[c] if mask >> j & 1 else best[c]] for j, c in enumerate(caps)} for mask in subsets], target
    )
    taken = np.zeros(size, dtype=int)
    for j in range(len(caps)):
        trial = taken | (1 << j)
        ok = found & np.take_along_axis(meets_sub, (trial - 1)[None], axis=0)[0]
        taken = np.where(ok, trial, taken)
    chosen = {c: allowed[np.where(taken >> j & 1, lower[c], best[c])] for j, c in enumerate(caps)}
    chosen = _midband_floors(f_low, chosen, allowed)
    floors = topology.capacitor_floors(resistors, conditions, target)
    if output_impedance_max is not None and "c_out" in chosen:
        floors["c_out"] = np.maximum(
            floors.get("c_out", 0.0), _output_floor(f_low, chosen, output_impedance_max, capacitor_low_edge)
        )
    return {c: np.maximum(v, allowed[_round_up(floors[c], allowed)]) if c in floors else v for c, v in chosen.items()}


def _output_floor(f_low: _LowCorner, chosen: dict[str, np.ndarray], limit: float, low_edge: float) -> np.ndarray:
    """Least c_out (F) per candidate for which the output impedance at the band's centre,
    |Z + 1/(j w C)| with Z the stage's own (a + jb), stays within ``limit`` (ohm) with c_out at
    ``low_edge`` times its value: a reactance X = 1/(w C) up to b + sqrt(limit^2 - a^2). 0 (no
    floor) where no value can do it (|a| at or above the limit, or a capacitive Z beyond it)."""
    z = f_low.output_impedance(chosen)
    room = limit**2 - z.real**2
    reactance = z.imag + np.sqrt(np.maximum(room, 0.0))
    w = 2.0 * np.pi * f_low.conditions.band_centre
    with np.errstate(divide="ignore", invalid="ignore"):
        least = 1.0 / (w * reactance * low_edge)
    return np.where((room > 0) & (reactance > 0), least, 0.0)


def _midband_floors(f_low: _LowCorner, chosen: dict[str, np.ndarray], allowed: np.ndarray) -> dict[str, np.ndarray]:
    """``chosen`` (F) with each capacitor raised, where it must be, to the smallest allowed value
    that alone (the others large) costs at most MIDBAND_LOSS / (capacitors) of |H| at the band's
    centre: the mid-band figures (gain, swing, distortion) take every coupling and bypass
    capacitor as a short there. A capacitor that does not set the low corner can still miss that:
    an emitter bypass inside a feedback loop whose removal costs the closed-loop gain less than
    3 dB has no -3 dB corner of its own, so the low corner alone would give it the smallest value.
    A bisection over the allowed values, for the capacitors and candidates that need it alone."""
    n = next(iter(chosen.values())).size
    least = 1.0 - MIDBAND_LOSS / len(chosen)
    out = dict(chosen)
    # one call: each capacitor alone at its value (the others large) and the all-large reference
    every = np.tile(np.arange(n), len(chosen) + 1)
    alone = {
        cap: np.concatenate([values if j == k else np.full(n, _LARGE_CAPACITANCE) for k in range(len(chosen) + 1)])
        for j, (cap, values) in enumerate(chosen.items())
    }
    h = f_low.at_centre(every, alone).reshape(len(chosen) + 1, n)
    large = h[-1]
    with np.errstate(divide="ignore", invalid="ignore"):
        ratios = h[:-1] / large
    for (cap, values), ratio in zip(chosen.items(), ratios):
        short = np.flatnonzero(ratio < least)  # NaN (no figure): left as chosen
        if not short.size:
            continue
        lo = _round_up(values[short], allowed) + 1  # the chosen value misses the share
        hi = np.full(short.size, allowed.size - 1)
        lo = np.minimum(lo, hi)
        while np.any(lo < hi):  # the smallest index meeting the share (hi meets it or is the largest)
            mid = (lo + hi) // 2
            with np.errstate(divide="ignore", invalid="ignore"):
                ok = f_low.at_centre(short, {cap: allowed[mid]}) / large[short] >= least
            active = lo < hi
            hi, lo = np.where(active & ok, mid, hi), np.where(active & ~ok, mid + 1, lo)
        out[cap] = values.copy()
        out[cap][short] = allowed[hi]
    return out


DECOUPLE_CORNER_DECADES = 1.0  # without a PSRR limit: r_decouple*c_decouple corner this many decades below the band


def size_decoupling(
    topology: Topology,
    parts: dict[str, np.ndarray],
    device: AnyDevice,
    conditions: Conditions,
    allowed: np.ndarray,
    psrr_min_db: float | None = None,
) -> np.ndarray:
    """c_decouple (F) for every candidate, from the sorted ``allowed`` values; 0 where r_decouple is 0.

    ``parts`` holds the stage's resistors and capacitors and r_decouple (ohm, per candidate).
    With ``psrr_min_db`` (dB): the smallest allowed value whose psrr_ripple_db (at
    conditions.ripple_frequency) meets it, found by a vectorised bisection over the allowed
    values (rejection grows with c_decouple); the largest where none does (the scoring then
    reports the limit as violated). Without it: the smallest allowed value putting the RC
    corner 1/(2 pi r_decouple c_decouple) a decade below the band's low edge.
    """
    allowed = np.sort(np.asarray(allowed, dtype=float))
    r_dec = np.atleast_1d(np.asarray(parts["r_decouple"], dtype=float))
    size = np.broadcast(*parts.values()).shape
    r_dec = np.broadcast_to(r_dec, size)
    corner = conditions.band[0] / 10.0**DECOUPLE_CORNER_DECADES
    with np.errstate(divide="ignore"):
        idx = _round_up(1.0 / (2.0 * np.pi * r_dec * corner), allowed)
    if psrr_min_db is not None:
        full = {k: np.broadcast_to(np.asarray(v, dtype=float), size) for k, v in parts.items()}
        lo, hi = np.zeros(size, dtype=int), np.full(size, allowed.size - 1)
        while np.any(lo < hi):  # smallest index meeting the limit (hi meets it or is the largest)
            mid = (lo + hi) // 2
            ok = (
                topology.psrr({**full, "c_decouple": allowed[mid]}, device, conditions)["psrr_ripple_db"] >= psrr_min_db
            )
            active = lo < hi
            hi, lo = np.where(active & ok, mid, hi), np.where(active & ~ok, mid + 1, lo)
        idx = lo
    return np.where(r_dec > 0, allowed[idx], 0.0)
