"""Checks of a spec against its catalog and the topologies, run before any trial.

One function, :func:`validate_spec`, used by `stagefit check`, the search (so `stagefit
search`, the Python API and the REST service all refuse the same specs) and the REST
service's spec check. It reports every problem at once, each naming the field, the value and
what would be valid:

- the spec's device ids and series exist in the catalog (``spec.check_against_catalog``);
- the sign of the gain can be given by at least one of the spec's topologies (each topology
  declares ``inverting``);
- each device's polarity is one some eligible topology is drawn for (``polarities``).
"""
from __future__ import annotations

from optimizer.catalog import Catalog
from optimizer.errors import InputError, Problem
from optimizer.spec import Spec, check_against_catalog
from optimizer.topologies import get_topology

TITLE = "spec cannot be searched"


def sign_eligible(spec: Spec) -> tuple[str, ...]:
    """The spec's topologies whose gain sign is the spec's (all of them when either sign will do):
    the ones the search space holds."""
    wanted = spec.gain.inverting
    return tuple(name for name in spec.topologies if wanted is None or get_topology(name).inverting == wanted)


def _gain_sign(spec: Spec) -> list[Problem]:
    """The gain's sign against the topologies that may give it."""
    wanted = spec.gain.inverting
    if sign_eligible(spec):
        return []
    sign = "an inverting" if wanted else "a non-inverting"
    shown = -spec.gain.target if wanted else spec.gain.target
    other = ("write a negative target (e.g. -10) or set gain.inverting: null to accept either sign"
             if not wanted else "set gain.inverting: null to accept either sign")
    return [Problem("gain.target", f"{shown:g}",
                    f"a gain sign some topology of the spec gives: no topology in the spec "
                    f"({', '.join(spec.topologies)}) gives {sign} gain; {other}")]


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
    problems += _gain_sign(spec) + _polarities(spec, catalog)
    if problems:
        raise InputError(problems, title=TITLE)
