"""Driver discovery through the entry-point group ``sweepgen.drivers``.

Third-party drivers are real distributions for these tests: a ``*.dist-info``
folder with ``entry_points.txt`` on ``sys.path``, read by ``importlib.metadata``.
"""

from __future__ import annotations

import textwrap

import pytest

from sweepgen import drivers
from sweepgen.drivers.base import Driver, FileDriver
from sweepgen.errors import DriverError, InputError

from conftest import install_driver_plugin

def install_plugin(root, entries: str, module="sg_test_plugin"):
    """Write the test plug-in module and a distribution registering ``entries`` under sweepgen.drivers."""
    install_driver_plugin(root, module, textwrap.dedent(entries))


def test_built_in_file_drivers_are_registered():
    names = drivers.available()
    for name in ("csv", "raw", "npy"):
        assert name in names
        cls = drivers.load(name, kind="file")
        assert issubclass(cls, FileDriver) and cls.name == name and cls.kind == "file"
        assert cls.description


def test_unknown_name_lists_the_registered_ones():
    with pytest.raises(InputError, match=r"no driver named 'hdf9'.*csv.*npy.*raw"):
        drivers.load("hdf9")


def test_a_third_party_driver_is_discovered(tmp_path, monkeypatch):
    install_plugin(tmp_path, "textcodes = sg_test_plugin:TextCodes\nscope = sg_test_plugin:Scope\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    assert "textcodes" in drivers.available()
    cls = drivers.load("textcodes", kind="file")
    assert cls.__module__ == "sg_test_plugin"
    rows = {r["name"]: r for r in drivers.describe()}
    assert rows["textcodes"]["kind"] == "file" and rows["scope"]["kind"] == "instrument"
    assert "textcodes" in drivers.names_of_kind("file") and "scope" not in drivers.names_of_kind("file")


def test_kind_is_enforced(tmp_path, monkeypatch):
    install_plugin(tmp_path, "scope = sg_test_plugin:Scope\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    assert issubclass(drivers.load("scope", kind="instrument"), Driver)
    with pytest.raises(InputError, match="delivers to an instrument"):
        drivers.load("scope", kind="file")


def test_broken_plugins_are_driver_errors_not_tracebacks(tmp_path, monkeypatch):
    install_plugin(tmp_path, "gone = sg_no_such_module:X\nnumber = sg_test_plugin:NOT_A_DRIVER\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    with pytest.raises(DriverError, match="'gone' failed to load"):
        drivers.load("gone")
    with pytest.raises(DriverError, match="not a driver class"):
        drivers.load("number")
    rows = {r["name"]: r for r in drivers.describe()}
    assert rows["gone"]["description"].startswith("failed to load")
    assert "gone" not in drivers.names_of_kind("file")


def test_a_plugin_cannot_take_over_a_built_in_name(tmp_path, monkeypatch):
    install_plugin(tmp_path, "raw = sg_test_plugin:TextCodes\n")
    monkeypatch.syspath_prepend(str(tmp_path))               # found before sweepgen itself
    assert drivers.load("raw").__module__ == "sweepgen.drivers.raw_file"


def test_between_plugins_the_first_on_the_path_wins(tmp_path, monkeypatch):
    first, second = tmp_path / "first", tmp_path / "second"
    first.mkdir()
    second.mkdir()
    install_plugin(first, "dup = sg_plug_a:TextCodes\n", module="sg_plug_a")
    install_plugin(second, "dup = sg_plug_b:TextCodes\n", module="sg_plug_b")
    monkeypatch.syspath_prepend(str(second))
    monkeypatch.syspath_prepend(str(first))
    assert drivers.available()["dup"].value == "sg_plug_a:TextCodes"
