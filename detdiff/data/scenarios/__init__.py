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

from detdiff.data.scenarios import streetcam, warehouse
from detdiff.data.scenarios.faults import DEFAULT_FAULT_RATES, DemoPaths

#: Scenario name -> generator function.
SCENARIOS: dict[str, Callable[..., DemoPaths]] = {
    "warehouse": warehouse.generate,
    "streetcam": streetcam.generate,
}
DEFAULT_SCENARIO = "warehouse"

__all__ = ["DEFAULT_FAULT_RATES", "DEFAULT_SCENARIO", "SCENARIOS", "DemoPaths", "generate_demo"]


def generate_demo(out_dir: str | Path, *, scenario: str = DEFAULT_SCENARIO, **options: Any) -> DemoPaths:
    """Write the named scenario into ``out_dir``; ``options`` go to its generator (see ``warehouse.generate``)."""
    try:
        generator = SCENARIOS[scenario]
    except KeyError:
        raise ValueError(f"generate_demo: unknown scenario {scenario!r}; "
                         f"expected one of {sorted(SCENARIOS)}") from None
    return generator(out_dir, **options)
