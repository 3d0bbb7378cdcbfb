"""Extensions a lab ships in its own installed package, found through entry points.

Three entry-point groups (declared in the lab package's ``pyproject.toml``):

- ``benchseq.profiles``: an instrument profile. The entry point's name is the profile name a
  bench file gives (``profile = "NAME"``); its object is the profile's TOML file — a path
  (``str`` or ``os.PathLike``), an ``importlib.resources`` Traversable, or a callable
  returning one of those.
- ``benchseq.drivers``: a driver class. The name is what a bench file gives as
  ``driver_class = "NAME"`` (a bare name; ``"package.module:Class"`` still works); the object
  is a subclass of the role's class (``benchseq.drivers.Generator`` …).
- ``benchseq.sim_devices``: a device model for the simulated bench. The name is what a
  scenario's ``[device] model = "NAME"`` gives; the object is a callable
  ``factory(section, folder) -> Device`` that reads its own keys from the scenario's
  ``[device]`` table (``benchseq.tomlfile.Section``; call ``section.done()`` at the end so
  misspelt keys are reported) and returns an object with the ``benchseq.sim.devices.Device``
  interface.

Shipped names (profiles in ``drivers/profiles``, the built-in device models) come first: an
entry point of the same name never replaces them. Listing entry points imports nothing; only
the one a file names is loaded, and a failure to load it is an input error naming the file and
key (exit 2), like a misspelt path.
"""

from __future__ import annotations

from importlib.metadata import EntryPoint, entry_points
from typing import Any

from benchseq.errors import FileKeyError

GROUPS = {
    "profile": "benchseq.profiles",
    "driver": "benchseq.drivers",
    "device": "benchseq.sim_devices",
}


def registered(kind: str) -> dict[str, EntryPoint]:
    """The entry points of one kind ("profile", "driver", "device"), by name."""
    found: dict[str, EntryPoint] = {}
    for point in entry_points(group=GROUPS[kind]):
        found.setdefault(point.name, point)  # the first distribution on the path wins
    return found


def names(kind: str) -> list[str]:
    return sorted(registered(kind))


def load(kind: str, name: str, source: str, key: str) -> Any:
    """The object registered as ``name`` for ``kind``; errors name ``source`` and ``key``."""
    point = registered(kind).get(name)
    if point is None:
        known = names(kind)
        listed = ", ".join(known) if known else "none installed"
        raise FileKeyError(
            source,
            key,
            f"no {kind} named {name!r} is registered (entry-point group {GROUPS[kind]}: {listed})",
        )
    try:
        return point.load()
    except Exception as exc:  # the lab package itself failed while importing
        raise FileKeyError(
            source,
            key,
            f"loading {kind} {name!r} ({point.value}, entry-point group {GROUPS[kind]}) failed: "
            f"{type(exc).__name__}: {exc}",
        ) from None
