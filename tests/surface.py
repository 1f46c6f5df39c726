"""The public names of a package, for the tests that pin each public surface.

In the style of httpx's own test: ``module.__all__`` must equal every public name the
module defines or imports (submodules aside), in the isort order ruff and the packages
use (CONSTANTS, then Classes, then functions), so a name cannot become public by accident
or be dropped from ``__all__`` unnoticed.
"""

from __future__ import annotations

import types


def isort_order(name: str) -> tuple[bool, bool, str]:
    return (not name.isupper(), not name[:1].isupper(), name)


def public_names(module: types.ModuleType) -> list[str]:
    return sorted(
        (
            name
            for name, value in vars(module).items()
            if not name.startswith("_") and not isinstance(value, types.ModuleType)
        ),
        key=isort_order,
    )
