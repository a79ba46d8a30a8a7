"""The two records that pass between stages: contacts, and a support plan.

:class:`Contacts` says where tips touch the part; :class:`SupportPlan` is what a
strategy (``straight``, ``tree``) makes of them: a directed graph of posts whose
load flows from the tips down to the feet on the base, or to landings on the
part.  Sizing changes its radii, geometry turns it into solids.  Both are frozen
records of numpy arrays; stages return new ones rather than edit them.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np

__all__ = ["Contacts", "SupportPlan", "CONTACT_KINDS"]

#: Why a contact exists: an overhang sample, a local minimum of the mesh, an
#: island found in the layers, a layer that reaches too far, added because a
#: tip nearby would otherwise be over capacity, or added by hand in a contacts file.
CONTACT_KINDS = ("overhang", "minimum", "island", "reach", "densify", "manual")


def _ro(a, dtype, shape_tail=()):
    a = np.array(a, dtype=dtype, copy=True)
    if a.size == 0:
        a = a.reshape((0, *shape_tail))
    a.setflags(write=False)
    return a


@dataclass(frozen=True)
class Contacts:
    """Points where supports touch the part.

    Attributes
    ----------
    points : (n, 3) float ndarray
        Contact points on the part surface, build coordinates (mm).
    normals : (n, 3) float ndarray
        Outward unit normals of the part at each point.
    kinds : (n,) str ndarray
        One of :data:`CONTACT_KINDS` per contact.
    diameters : (n,) float ndarray
        Tip diameter at the part (mm).
    loads : (n,) float ndarray
        Peak load each tip carries (N); zero until forces are computed.
    peak_layers : (n,) int ndarray
        Layer index of each tip's peak load; -1 until forces are computed.
    """

    points: np.ndarray
    normals: np.ndarray
    kinds: np.ndarray
    diameters: np.ndarray
    loads: np.ndarray = None
    peak_layers: np.ndarray = None

    def __post_init__(self):
        n = len(self.points)
        object.__setattr__(self, "points", _ro(self.points, float, (3,)))
        object.__setattr__(self, "normals", _ro(self.normals, float, (3,)))
        object.__setattr__(self, "kinds", _ro(self.kinds, "<U8"))
        object.__setattr__(self, "diameters", _ro(self.diameters, float))
        object.__setattr__(self, "loads", _ro(np.zeros(n) if self.loads is None else self.loads, float))
        object.__setattr__(
            self, "peak_layers", _ro(np.full(n, -1) if self.peak_layers is None else self.peak_layers, int)
        )
        for name in ("normals", "kinds", "diameters", "loads", "peak_layers"):
            if len(getattr(self, name)) != n:
                raise ValueError(f"Contacts.{name} has {len(getattr(self, name))} rows, points has {n}")

    def __len__(self) -> int:
        return len(self.points)

    def replace(self, **changes) -> Contacts:
        return dataclasses.replace(self, **changes)

    def take(self, index) -> Contacts:
        """The contacts at ``index`` (an index array or bool mask), every field alike."""
        return Contacts(*(getattr(self, f.name)[index] for f in dataclasses.fields(self)))

    @classmethod
    def empty(cls) -> Contacts:
        return cls(np.zeros((0, 3)), np.zeros((0, 3)), np.zeros(0, "<U8"), np.zeros(0))

    @classmethod
    def concat(cls, parts: list[Contacts]) -> Contacts:
        parts = [p for p in parts if len(p)]
        if not parts:
            return cls.empty()
        return cls(*(np.concatenate([getattr(p, f.name) for p in parts]) for f in dataclasses.fields(cls)))

    def to_records(self) -> list[dict]:
        """One plain dict per contact, for the JSON report."""
        return [
            {
                "point": [round(float(v), 4) for v in p],
                "normal": [round(float(v), 4) for v in nrm],
                "kind": str(k),
                "diameter_mm": round(float(d), 4),
                "load_n": round(float(f), 6),
                "peak_layer": int(pl),
            }
            for p, nrm, k, d, f, pl in zip(
                self.points, self.normals, self.kinds, self.diameters, self.loads, self.peak_layers
            )
        ]


@dataclass(frozen=True)
class SupportPlan:
    """A strategy's supports as a directed graph, before solids are built.

    Load flows along each edge from its first node to its second, from tips
    down to feet.  A *tip* is a cone that joins a contact point on the part to a
    node; a *landing* tip is the lower end of a post that stands on the part
    (model-to-model) instead of the base.

    Attributes
    ----------
    strategy : str
        Name of the strategy that made the plan.
    nodes : (N, 3) float ndarray
        Node positions (mm).
    edges : (E, 2) int ndarray
        Post segments as (upper node, lower node): load flows from the first to the second.
    edge_radius : (E,) float ndarray
        Radius of each segment (mm).
    tip_points : (T, 3) float ndarray
        Where each tip touches the part.
    tip_nodes : (T,) int ndarray
        The node the wide end of each tip joins.
    tip_diameters : (T,) float ndarray
        Diameter of each tip where it touches the part (mm).
    tip_contact : (T,) int ndarray
        Index of the contact a tip serves, or -1 for a landing tip.
    feet : (F,) int ndarray
        Nodes that stand on the base.
    braces : (B, 2) int ndarray
        Pairs of nodes joined by a brace (carries no load in the model).
    """

    strategy: str
    nodes: np.ndarray
    edges: np.ndarray
    edge_radius: np.ndarray
    tip_points: np.ndarray
    tip_nodes: np.ndarray
    tip_diameters: np.ndarray
    tip_contact: np.ndarray
    feet: np.ndarray
    braces: np.ndarray = field(default_factory=lambda: np.zeros((0, 2), int))

    def __post_init__(self):
        for name, dtype, tail in (
            ("nodes", float, (3,)),
            ("edges", int, (2,)),
            ("edge_radius", float, ()),
            ("tip_points", float, (3,)),
            ("tip_nodes", int, ()),
            ("tip_diameters", float, ()),
            ("tip_contact", int, ()),
            ("feet", int, ()),
            ("braces", int, (2,)),
        ):
            object.__setattr__(self, name, _ro(getattr(self, name), dtype, tail))
        if len(self.edge_radius) != len(self.edges):
            raise ValueError("SupportPlan.edge_radius must have one value per edge")
        t = len(self.tip_points)
        if not (len(self.tip_nodes) == len(self.tip_diameters) == len(self.tip_contact) == t):
            raise ValueError("SupportPlan tip arrays must have one row per tip")

    def replace(self, **changes) -> SupportPlan:
        return dataclasses.replace(self, **changes)

    @property
    def landings(self) -> int:
        """Number of tips where a post stands on the part instead of the base."""
        return int(np.count_nonzero(self.tip_contact < 0))

    def segment_length(self) -> float:
        """Total length of post segments (mm)."""
        if len(self.edges) == 0:
            return 0.0
        d = self.nodes[self.edges[:, 0]] - self.nodes[self.edges[:, 1]]
        return float(np.linalg.norm(d, axis=1).sum())
