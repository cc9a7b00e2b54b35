"""Ladder networks between a source of impedance z0 and a load: Zin, Gamma_in, power.

A ladder is a sequence of (position, impedance) pairs listed from the source port toward
the load, with ``position`` "series" or "shunt". Everything is vectorised: impedances
and the load broadcast against each other, so (candidates x frequencies) is one call.

The cascade is done with ABCD matrices (series Z: [[1, Z], [0, 1]]; shunt Y = 1/Z:
[[1, 0], [Y, 1]]), which also gives the power that actually reaches the load:
``P_load / P_available = 4 z0 Re(ZL) / |A ZL + B + z0 (C ZL + D)|**2``; for a lossless
ladder this equals ``1 - |Gamma_in|**2``.

The eight two-element arrangements (:data:`TOPOLOGIES`) are every order of one series
and one shunt part, each an inductor or a capacitor.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from pipeline.elements import Element


_LETTER = {"inductor": "L", "capacitor": "C"}


@dataclass(frozen=True)
class Topology:
    """Positions and kinds of a two-part ladder, from the source port toward the load."""

    positions: tuple[str, str]
    kinds: tuple[str, str]

    @property
    def name(self) -> str:
        """E.g. ``'shunt-C, series-L'`` (source side first)."""
        return ", ".join(f"{p}-{_LETTER[k]}" for p, k in zip(self.positions, self.kinds))


TOPOLOGIES: tuple[Topology, ...] = tuple(
    Topology(positions, kinds)
    for positions in (("series", "shunt"), ("shunt", "series"))
    for kinds in itertools.product(("inductor", "capacitor"), repeat=2)
)


def cascade_abcd(ladder):
    """ABCD parameters (A, B, C, D arrays) of a ladder [(position, Z), ...], source first."""
    a, b, c, d = 1.0 + 0j, 0j, 0j, 1.0 + 0j
    for position, z in ladder:
        z = np.asarray(z)
        if position == "series":          # [[a, b], [c, d]] @ [[1, z], [0, 1]]
            b = a * z + b
            d = c * z + d
        elif position == "shunt":         # [[a, b], [c, d]] @ [[1, 0], [1/z, 1]]
            y = 1 / z
            a = a + b * y
            c = c + d * y
        else:
            raise ValueError(f"position must be 'series' or 'shunt', not {position!r}")
    return a, b, c, d


def input_impedance(ladder, z_load) -> np.ndarray:
    """Impedance (ohm) seen from the source port looking into the ladder and load."""
    a, b, c, d = cascade_abcd(ladder)
    return (a * z_load + b) / (c * z_load + d)


def reflection(z, z0: float) -> np.ndarray:
    """Reflection coefficient of impedance ``z`` at real reference ``z0``."""
    return (z - z0) / (z + z0)


def gamma_in(ladder, z_load, z0: float) -> np.ndarray:
    """Reflection coefficient at the source port with the ladder in front of the load."""
    return reflection(input_impedance(ladder, z_load), z0)


def delivered_fraction(ladder, z_load, z0: float) -> np.ndarray:
    """Fraction (0..1) of the source's available power that reaches the load's resistance."""
    a, b, c, d = cascade_abcd(ladder)
    return 4 * z0 * np.real(z_load) / np.abs(a * z_load + b + z0 * (c * z_load + d)) ** 2


def element_ladder(elements: list[Element] | tuple[Element, ...], freq_hz):
    """A ladder [(position, Z(f)), ...] from concrete elements at ``freq_hz``."""
    return [(e.position, e.impedance(freq_hz)) for e in elements]
