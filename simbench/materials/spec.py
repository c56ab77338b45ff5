"""What a material is, as the rest of the code sees it.

A phantom names materials in three ways (catalogue name, custom composition, explicit mu);
all become a :class:`MaterialSpec`. :func:`simbench.materials.mu_table` turns a list of specs
into mu(E) in 1/mm on an energy grid; explicit-mu materials are constant in energy.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class MaterialSpec:
    """One material of a phantom.

    Attributes
    ----------
    name : str
        Catalogue name, the custom material's name, or a generated label for explicit mu
        (e.g. ``"mu=0.02/mm"``).
    kind : str
        ``"catalogue"``, ``"custom"`` or ``"mu"``.
    formula : str
        Chemical formula (custom by formula); empty otherwise.
    mass_fractions : tuple of (element symbol, fraction)
        Composition by mass (catalogue entries and custom by fractions); fractions sum to 1.
    density_g_cm3 : float
        Mass density in g/cm^3 (0 for explicit mu).
    mu_per_mm : float
        Explicit attenuation coefficient in 1/mm (kind ``"mu"`` only; may be negative in
        ``add`` mode, as in published additive phantoms).
    reference : str
        Where the composition and density come from (published compilation), for reports.
    """

    name: str
    kind: str
    formula: str = ""
    mass_fractions: tuple = ()
    density_g_cm3: float = 0.0
    mu_per_mm: float = 0.0
    reference: str = ""
