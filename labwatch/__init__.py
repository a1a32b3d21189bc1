"""labwatch: a live monitor for Bell tests with entangled photons.

Layers: a pure computational core (scenario, strategies, bell, models, polytope, stats,
accumulate, snapshot), an I/O layer (protocol, transport, recording, control) and views
(widgets, console, report).  See DEVELOPERS.md for the map.
"""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__"]
