"""shapes: name machined and fabricated parts from 3D scans in any pose, and know whether the
model stays right when a part is turned over or mirrored."""

__version__ = "0.1.0"

from shapes.errors import ConfigError, DataError, InputError, MeshError, ShapesError

__all__ = ["__version__", "ShapesError", "InputError", "MeshError", "ConfigError", "DataError"]
