"""bondcheck: check crystal structures against electron-counting predictions."""
__version__ = "0.1.0"

__all__ = ["check", "check_all", "check_crystal", "check_crystals", "Result", "Options", "StructureError", "__version__"]


def __getattr__(name):
    if name in ("check", "check_all", "check_crystal", "check_crystals", "Result", "Options"):
        from . import api

        return getattr(api, name)
    if name in ("StructureError", "Crystal"):
        from . import record

        return getattr(record, name)
    raise AttributeError(name)
