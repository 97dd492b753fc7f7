"""Backends behind the rig ports, registered by name and imported lazily.

``sim`` is the software-in-the-loop rig (package ``sim``), ``can`` servos and I/O on CAN through
python-can, ``bridge`` an I/O bridge (or a SIL server process) over pyzmq.
"""
from __future__ import annotations

import importlib

from ..errors import ProfileError

__all__ = ["BACKENDS", "backend_class"]

BACKENDS = {
    "sim": "sim.rig:VirtualRig",
    "can": "flapctl.ports.can:CanPorts",
    "bridge": "flapctl.ports.bridge:BridgePorts",
}


def backend_class(name: str, source: str = "<profile>") -> type:
    """The ports class registered as ``name``; a clear error naming the choices otherwise."""
    target = BACKENDS.get(name)
    if target is None:
        raise ProfileError(source, "bus.backend", name, "one of " + ", ".join(map(repr, BACKENDS)))
    module, _, cls = target.partition(":")
    try:
        return getattr(importlib.import_module(module), cls)
    except (ImportError, AttributeError) as exc:
        raise ProfileError(source, "bus.backend", name,
                           f"an installed backend (importing {target} failed: {exc})") from exc
