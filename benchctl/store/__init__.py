"""Run folder writing and reading (see :mod:`benchctl.store.runfolder`)."""

from benchctl.store.runfolder import Damage, RunFolder, sanitise_key, sanitise_name

__all__ = ["Damage", "RunFolder", "sanitise_key", "sanitise_name"]
