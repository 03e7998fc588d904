"""The deform task's stiffness names and what they mean: light to import (the command line builds its
options from them without loading the elastic solver)."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Material:
    """volume_weight : weight v of the volume term against the elastic one (0: as rigid as possible,
    volume free to change, Poisson's ratio 0; 10: almost incompressible, it bulges where squeezed);
    sheet_thickness : thickness given to a sheet with no inside, fraction of the longest side."""

    volume_weight: float
    sheet_thickness: float


#: Stiffness names an artist picks from. For a solid, the shape a set of handles asks for does not
#: depend on how hard the material is (only on how it keeps its volume), so the names set how
#: firmly volume is kept: rubber keeps it like rubber does and bulges; stiff is the plain
#: as-rigid-as-possible solid of the elastic reference. For a sheet they set its thickness: a thin
#: one bends locally, a thick one spreads the bend. Measured on the bench cases: medium keeps the
#: volume of a bent bar within 0.3% and stays within 0.3% of the diagonal of the reference.
STIFFNESS = {
    "rubber": Material(10.0, 0.005),
    "soft": Material(3.0, 0.01),
    "medium": Material(1.0, 0.02),
    "firm": Material(0.3, 0.05),
    "stiff": Material(0.0, 0.1),
}
DEFAULT_STIFFNESS = "medium"
