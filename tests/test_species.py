"""Species profiles: every value carries its source; broken files are refused clearly."""

import pytest

from sweepgen import catalog
from sweepgen.errors import InputError
from sweepgen.species import load_species


@pytest.mark.parametrize("key", catalog.builtin_keys("species"))
def test_every_builtin_value_names_a_source(key):
    sp = load_species(key)
    assert sp.wavelength > 0 and sp.mass > 0 and sp.gamma > 0
    for name in ("wavelength", "mass"):
        assert len(sp.sources[name]) > 10
    # every value given, not only the required ones, names its publication
    assert all(len(text) > 10 for text in sp.sources.values())
    if sp.saturation_intensity is not None:
        assert "saturation_intensity" in sp.sources
    assert "lifetime" in sp.sources or "linewidth" in sp.sources
    if sp.kind == "molecule":
        assert 0 < sp.loss_per_photon < 1e-2
        assert "loss_per_photon" in sp.sources


GOOD = """title = "test atom"
[wavelength]
value = "780 nm"
source = "made up for a test"
[mass]
value = "87 u"
source = "made up for a test"
[lifetime]
value = "26 ns"
source = "made up for a test"
"""


def test_linewidth_instead_of_lifetime(tmp_path):
    path = tmp_path / "atom.toml"
    path.write_text(GOOD.replace('[lifetime]\nvalue = "26 ns"', '[linewidth]\nvalue = "6 MHz"'))
    sp = load_species(str(path))
    assert sp.linewidth == pytest.approx(6e6)


@pytest.mark.parametrize("edit,fragment", [
    (lambda t: t.replace('source = "made up for a test"\n[mass]', '[mass]'), "wavelength.source"),
    (lambda t: t + '[linewidth]\nvalue = "6 MHz"\nsource = "x"\n', "exactly one"),
    (lambda t: t.replace('"87 u"', '"87 m"'), "mass.value"),
    (lambda t: t + 'colour = "red"\n', "colour"),
    (lambda t: t.replace('title = "test atom"', 'title = "m"\nkind = "molecule"'), "loss_per_photon"),
    (lambda t: t + '[loss_per_photon]\nvalue = 1.5\nsource = "x"\n', "loss_per_photon"),
])
def test_broken_species(tmp_path, edit, fragment):
    path = tmp_path / "atom.toml"
    path.write_text(edit(GOOD))
    with pytest.raises(InputError) as info:
        load_species(str(path))
    assert fragment in str(info.value) and "atom.toml" in str(info.value)
