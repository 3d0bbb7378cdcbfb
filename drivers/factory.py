"""Role objects from a bench file's instrument entry: profile + transport (+ driver class)."""

from __future__ import annotations

import importlib
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from benchseq import plugins
from benchseq.bench import Bench, InstrumentSpec
from benchseq.drivers.generator import Generator
from benchseq.drivers.instrument import Instrument
from benchseq.drivers.load import Load
from benchseq.drivers.profile import Profile, load_profile
from benchseq.drivers.scope import Scope
from benchseq.drivers.supply import Supply
from benchseq.drivers.transport import Transport
from benchseq.errors import FileKeyError

ROLE_CLASSES: dict[str, type[Instrument]] = {
    "generator": Generator,
    "supply": Supply,
    "scope": Scope,
    "load": Load,
}


def bench_dir(bench: Bench) -> Path | None:
    """The folder of the bench file (relative profile paths are read from there)."""
    if bench.source.startswith("sim:"):
        return None
    return Path(bench.source).parent


def profile_for(spec: InstrumentSpec, bench: Bench) -> Profile:
    """The bench entry's profile, checked to be one for its role."""
    return load_profile(spec.profile, spec.role, bench_dir(bench))


def driver_class(spec: InstrumentSpec, source: str) -> type[Instrument]:
    """The role class, or the bench file's ``driver_class = "pkg.mod:Class"`` (a subclass)."""
    base = ROLE_CLASSES[spec.role]
    if spec.driver_class is None:
        return base
    key = f"{spec.role}.driver_class"
    if ":" not in spec.driver_class:  # a name a lab package registers (entry point)
        found: Any = plugins.load("driver", spec.driver_class, source, key)
        if not (isinstance(found, type) and issubclass(found, base)):
            raise FileKeyError(
                source,
                key,
                f"the driver registered as {spec.driver_class!r} must be a subclass of "
                f"benchseq.drivers.{base.__name__}",
            )
        return found
    module_name, _, class_name = spec.driver_class.partition(":")
    if not module_name or module_name.startswith(".") or not class_name:
        raise FileKeyError(source, key, "expected 'package.module:ClassName' (absolute)")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise FileKeyError(source, key, f"cannot import module {module_name!r}: {exc}") from None
    except Exception as exc:  # the user's module itself failed while importing
        raise FileKeyError(
            source, key, f"importing module {module_name!r} failed: {type(exc).__name__}: {exc}"
        ) from None
    found = getattr(module, class_name, None)
    if found is None:
        raise FileKeyError(source, key, f"module {module_name!r} has no class {class_name!r}")
    if not (isinstance(found, type) and issubclass(found, base)):
        raise FileKeyError(
            source,
            key,
            f"{spec.driver_class} must be a subclass of benchseq.drivers.{base.__name__}",
        )
    return found


def build_instrument(
    spec: InstrumentSpec,
    transport: Transport,
    bench: Bench,
    *,
    profile: Profile | None = None,
    sleep: Callable[[float], None] = time.sleep,
) -> Instrument:
    """The role object for ``spec`` talking through ``transport``."""
    profile = profile if profile is not None else profile_for(spec, bench)
    cls = driver_class(spec, bench.source)
    if issubclass(cls, Scope):
        return cls(profile, transport, spec, bench.scope, sleep=sleep)
    return cls(profile, transport, spec, sleep=sleep)
