"""detdiff: audit a COCO object-detection dataset before training on it.

A small detector is trained on the dataset itself; three loss streams (box regression, positive-class,
background-class) are logged for every image and object at every epoch and accumulated into difficulty
scores (higher = harder), linked to causes, and used to flag suspected label errors.
"""

__version__ = "0.1.0"

__all__ = ["audit", "plan_audit", "open_run", "check", "AuditRun", "__version__"]


def __getattr__(name: str):
    """Import the API lazily so ``import detdiff`` stays quick (torch loads only when needed)."""
    if name in ("audit", "plan_audit", "open_run", "check", "AuditRun"):
        from detdiff import api

        return getattr(api, name)
    raise AttributeError(f"module 'detdiff' has no attribute {name!r}")
