"""Each package's face (``__init__``) hands on the public names of its modules, nothing missing."""

from __future__ import annotations

import importlib

import pytest

# package -> the modules whose ``__all__`` the face must hand on in full
FACES = {
    "rig.planning": ("benchfile", "sequence", "plan", "limits", "review"),
    "rig.runner": ("cycle", "interlocks", "opener", "display"),
    "rig.store": ("schema", "waveform", "runfolder", "lock", "atomic", "tables"),
    "rig.analysis": (
        "metrics",
        "stats",
        "selfdischarge",
        "compare",
        "analyze",
        "measure",
        "runs",
        "provenance",
        "identify",
        "sourcenet",
        "predict",
        "predictrun",
        "bands",
        "gridquantiles",
    ),
    "rig.report": ("page", "certificate"),
    "rig.dataset": ("catalog", "build", "query", "variance", "control", "cluster", "distribute"),
}
DRIVER_MODULES = ("clock", "metermode", "profile", "scope", "session", "supply", "switch")
# module-level helpers that stay in their module on purpose (not part of the package API)
MODULE_ONLY = {"channel_list", "parse_error_reply", "parse_block_header", "scpi_header_matches"}


@pytest.mark.parametrize("package", sorted(FACES))
def test_every_public_name_of_a_stage_is_exported(package):
    face = importlib.import_module(package)
    assert face.__doc__ and len(face.__doc__.split()) > 20, f"{package} needs its paragraph"
    exported = set(face.__all__)
    for name in FACES[package]:
        module = importlib.import_module(f"{package}.{name}")
        missing = set(module.__all__) - exported
        assert not missing, f"{package}.{name} exports {sorted(missing)} but {package} does not"
    for n in face.__all__:
        assert hasattr(face, n), f"{package}.{n}"


def test_every_public_class_of_the_instrument_layer_is_exported():
    import drivers

    exported = set(drivers.__all__)
    for name in DRIVER_MODULES:
        module = importlib.import_module(f"drivers.{name}")
        public = {
            n
            for n in getattr(module, "__all__", ())
            if isinstance(getattr(module, n), type) and n not in MODULE_ONLY
        }
        missing = public - exported
        assert not missing, f"drivers.{name} exports {sorted(missing)} but drivers does not"
    for n in drivers.__all__:
        assert hasattr(drivers, n), n
