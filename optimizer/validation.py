"""Checks of a spec against its catalog and the topologies, run before any trial.

One function, :func:`validate_spec`, used by `stagefit check`, the search (so `stagefit
search`, the Python API and the REST service all refuse the same specs) and the REST
service's spec check. It reports every problem at once, each naming the field, the value and
what would be valid:

- the spec's device ids and series exist in the catalog (``spec.check_against_catalog``);
- the sign of the gain can be given by at least one of the spec's topologies (each topology
  declares ``inverting``);
- each device's polarity is one some eligible topology is drawn for (``polarities``);
- some topology of the spec takes a device of the spec (``device_kind``: JFET stages take
  JFETs, the others bipolar transistors).
"""
from __future__ import annotations

from optimizer.catalog import Catalog
from optimizer.errors import InputError, Problem
from optimizer.spec import Spec, check_against_catalog
from optimizer.topologies import get_topology

TITLE = "spec cannot be searched"


def device_kind(catalog: Catalog, device: str) -> str | None:
    """The kind of catalog device ``device`` ("jfet" for polarity njf, else "bjt"); None if unknown."""
    rows = catalog.transistors[catalog.transistors["id"] == device]
    return None if rows.empty else ("jfet" if str(rows.iloc[0]["polarity"]).lower() == "njf" else "bjt")


def topologies_with_devices(spec: Spec, catalog: Catalog) -> tuple[str, ...]:
    """The spec's topologies that some device of the spec can fill (a topology's device_kind
    matches the device's kind: JFET stages take JFETs, the others bipolar transistors)."""
    kinds = {device_kind(catalog, d) for d in spec.devices}
    return tuple(name for name in spec.topologies if get_topology(name).device_kind in kinds)


def _gain_sign(spec: Spec, catalog: Catalog) -> list[Problem]:
    """The gain's sign against the topologies that may give it (with a device of their kind)."""
    wanted = spec.gain.inverting
    if wanted is None:
        return []
    able = [name for name in topologies_with_devices(spec, catalog) if get_topology(name).inverting == wanted]
    if able:
        return []
    sign = "an inverting" if wanted else "a non-inverting"
    shown = -spec.gain.target if wanted else spec.gain.target
    other = ("write a negative target (e.g. -10) or set gain.inverting: null to accept either sign"
             if not wanted else "set gain.inverting: null to accept either sign")
    return [Problem("gain.target", f"{shown:g}",
                    f"a gain sign some topology of the spec gives: no topology in the spec with a device "
                    f"of its kind ({', '.join(topologies_with_devices(spec, catalog)) or 'none'}) gives "
                    f"{sign} gain; {other}")]


def _polarities(spec: Spec, catalog: Catalog) -> list[Problem]:
    """Each device's polarity against the polarities the spec's topologies are drawn for."""
    problems = []
    rows = catalog.transistors.set_index("id")
    drawn = {name: get_topology(name).polarities for name in spec.topologies}
    for i, device in enumerate(spec.devices):
        if device not in rows.index:
            continue  # reported by check_against_catalog
        polarity = str(rows.loc[device, "polarity"]).lower()
        if not any(polarity in p for p in drawn.values()):
            supported = sorted({p for ps in drawn.values() for p in ps})
            problems.append(Problem(f"devices[{i}]", device,
                                    f"a {' or '.join(supported)} transistor: {device} is {polarity}, and no "
                                    f"topology in the spec ({', '.join(spec.topologies)}) is drawn for "
                                    f"{polarity} devices"))
    return problems


def validate_spec(spec: Spec, catalog: Catalog) -> None:
    """Raise InputError (every problem at once) unless ``spec`` can be searched in ``catalog``."""
    problems: list[Problem] = []
    try:
        check_against_catalog(spec, catalog)
    except InputError as error:
        problems += error.problems
    problems += _gain_sign(spec, catalog) + _polarities(spec, catalog)
    if not problems and not topologies_with_devices(spec, catalog):
        problems.append(Problem("devices", list(spec.devices),
                                f"a device some topology of the spec takes: {', '.join(spec.topologies)} take "
                                f"{' or '.join(sorted({get_topology(t).device_kind for t in spec.topologies}))} "
                                "devices (JFET stages take JFETs, polarity njf)"))
    if problems:
        raise InputError(problems, title=TITLE)
