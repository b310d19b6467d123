"""The package's public face: __all__ is complete and importable; the version comes from metadata."""

import importlib.metadata

import fleetsim


def test_all_names_exist_and_cover_the_public_objects():
    for name in fleetsim.__all__:
        assert hasattr(fleetsim, name), name
    module = type(fleetsim)
    public = {n for n in dir(fleetsim) if not n.startswith("_") and not isinstance(getattr(fleetsim, n), module)}
    assert public <= set(fleetsim.__all__), public - set(fleetsim.__all__)


def test_version_comes_from_package_metadata():
    assert fleetsim.__version__ == importlib.metadata.version("fleetsim")


def test_package_ships_type_information():
    from pathlib import Path

    assert (Path(fleetsim.__file__).parent / "py.typed").exists()
