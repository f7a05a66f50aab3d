"""fleetdb: cranking-compression and vacuum history of a fleet's engines, and what it means."""

from fleetdb.errors import FleetDBError, InvalidInput, InvalidValue, SchemaOutOfDate, UnitNotFound

__version__ = "0.1.0"

__all__ = [
    "FleetDBError",
    "InvalidInput",
    "InvalidValue",
    "SchemaOutOfDate",
    "UnitNotFound",
    "__version__",
]
