"""Version policy: the package's version is the posgrid crate's (README, Python section)."""

import importlib.metadata
import tomllib

import posgrid
from conftest import REPO, cli


def test_the_package_version_is_the_crate_version():
    crate = tomllib.loads((REPO / "Cargo.toml").read_text())["package"]["version"]
    bindings = tomllib.loads((REPO / "python" / "Cargo.toml").read_text())["package"]["version"]
    assert posgrid.__version__ == crate
    assert posgrid.core_version == crate
    assert bindings == crate
    assert importlib.metadata.version("posgrid") == crate
    assert cli("--version").stdout.split() == ["posgrid", crate]
