"""rtemu: fast, audited emulators of a clear-sky radiance observation operator.

Public API, grouped by stage (physics -> sampling -> training -> runtime -> audit ->
assimilation). Everything else is internal.
"""

__version__ = "0.1.0"

from rtemu.instrument import Band, Channel, Instrument, list_instruments, load_instrument
from rtemu import flags, physics

__all__ = [
    "__version__",
    # instruments
    "Band",
    "Channel",
    "Instrument",
    "list_instruments",
    "load_instrument",
    # physics and flags
    "physics",
    "flags",
]
