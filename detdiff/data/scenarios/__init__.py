"""Demo scenarios by name: drawn (or loaded) datasets written as COCO with label faults planted on purpose.

Each scenario module has a ``generate(out_dir, *, num_images, seed, ..., fault_rates, progress)``
that writes ``annotations.json`` (faults in), ``images/`` and ``truth.json`` (clean labels and the
list of faults) through :mod:`detdiff.data.scenarios.faults`, and returns :class:`DemoPaths`.
Shared pieces: :mod:`~detdiff.data.scenarios.drawing` (shapes, placement, light) and
:mod:`~detdiff.data.scenarios.faults` (seeding, fault planter, truth and COCO writer).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Callable

from detdiff.data.scenarios import aerial, digits, streetcam, warehouse
from detdiff.data.scenarios.faults import DEFAULT_FAULT_RATES, DemoPaths

#: Scenario name -> generator function: the tuned-on warehouse table and three held-out scenes.
SCENARIOS: dict[str, Callable[..., DemoPaths]] = {
    "warehouse": warehouse.generate,     # ceiling camera over a packing table, 320 x 240, 6 classes
    "aerial": aerial.generate,           # drone over a marina and car park, mixed sizes, 15 long-tailed classes
    "digits": digits.generate,           # real handwritten digits as house numbers on real photographs
    "streetcam": streetcam.generate,     # city street at real photo sizes (640 to 4000 px), 24 look-alike classes
}
DEFAULT_SCENARIO = "warehouse"
#: The ``--flips`` a user would choose for each scene from its view's symmetry (the one setting a user must give:
#: boxes cannot tell it): no up or down from a ceiling or a drone, upright digits, a street with a sky.
SCENARIO_FLIPS: dict[str, str] = {"warehouse": "dihedral", "aerial": "dihedral", "digits": "none",
                                  "streetcam": "horizontal"}

__all__ = ["DEFAULT_FAULT_RATES", "DEFAULT_SCENARIO", "SCENARIOS", "SCENARIO_FLIPS", "DemoPaths", "generate_demo"]


def generate_demo(out_dir: str | Path, *, scenario: str = DEFAULT_SCENARIO, **options: Any) -> DemoPaths:
    """Write the named scenario into ``out_dir``; ``options`` go to its generator (see each module's ``generate``)."""
    try:
        generator = SCENARIOS[scenario]
    except KeyError:
        raise ValueError(f"generate_demo: unknown scenario {scenario!r}; "
                         f"expected one of {sorted(SCENARIOS)}") from None
    return generator(out_dir, **options)
