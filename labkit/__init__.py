"""labkit: plan, predict, check and record readings of bench-scale AC power-grid lab sessions.

``import labkit`` stays light: subpackages load on first use.

Layers (imports only point downwards):

- :mod:`labkit.core`: numeric core and value objects (numpy, pydantic; no I/O, no widgets)
- :mod:`labkit.files`: reading and validating bench, cart and template files
- :mod:`labkit.cli`: the ``labkit`` command
"""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__"]
