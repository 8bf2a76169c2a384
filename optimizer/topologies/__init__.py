"""Registry of stage topologies: name -> model instance."""
from __future__ import annotations

from optimizer.errors import InputError
from optimizer.topologies.base import Conditions, StageResult, Topology
from optimizer.topologies.ce_follower import CEFollower
from optimizer.topologies.divider_ce import DividerCE
from optimizer.topologies.divider_ce_split import DividerCESplit
from optimizer.topologies.feedback_ce import FeedbackCE

TOPOLOGIES: dict[str, Topology] = {t.name: t for t in (DividerCE(), DividerCESplit(), FeedbackCE(), CEFollower())}


def get_topology(name: str) -> Topology:
    """The topology registered under name (InputError listing the valid names otherwise)."""
    try:
        return TOPOLOGIES[name]
    except (KeyError, TypeError):
        raise InputError.single("topology", name, f"one of {', '.join(TOPOLOGIES)}",
                                title="unknown topology") from None


__all__ = ["TOPOLOGIES", "Conditions", "StageResult", "Topology", "get_topology"]
