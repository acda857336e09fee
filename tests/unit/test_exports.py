"""The drivers package hands on the public classes of its modules, and nothing is missing."""

from __future__ import annotations

import importlib

import drivers

MODULES = ("clock", "errors", "metermode", "profile", "scope", "session", "supply", "switch")
# module-level helpers that stay in their module on purpose (not part of the package API)
MODULE_ONLY = {"channel_list", "parse_error_reply", "parse_block_header", "scpi_header_matches"}


def test_every_public_class_of_the_instrument_layer_is_exported():
    exported = set(drivers.__all__)
    for name in MODULES:
        module = importlib.import_module(f"drivers.{name}")
        public = {
            n
            for n in getattr(module, "__all__", ())
            if isinstance(getattr(module, n), type) and n not in MODULE_ONLY
        }
        missing = public - exported
        assert not missing, f"drivers.{name} exports {sorted(missing)} but drivers does not"


def test_exported_names_exist():
    for n in drivers.__all__:
        assert hasattr(drivers, n), n
