"""Shared fixtures: small specs written into temporary folders, and a quiet environment."""
from __future__ import annotations

import logging
import os
import warnings
from pathlib import Path

import pytest

import hierwork.runtime  # noqa: F401  (BLAS for PyTensor before any test imports it)

DATA = Path(__file__).parent / "data"

warnings.filterwarnings("ignore", message=".*ArviZ is undergoing a major refactor.*")
warnings.filterwarnings("ignore", message=".*could not link to a BLAS.*")
for _name in ("pymc", "pytensor", "arviz"):
    logging.getLogger(_name).setLevel(logging.ERROR)
os.environ.setdefault("MPLBACKEND", "Agg")


@pytest.fixture(scope="session", autouse=True)
def demo_data():
    """The demo data, as ``hierwork demo`` makes it (a fresh clone has none; several tests read it)."""
    from hierwork.pipeline import demo_specs_folder
    from hierwork.demo import DEMO_DATASETS, make_demo_data

    folder = demo_specs_folder().parent / "demo" / "data"
    if not all((folder / f"{name}.csv").is_file() for name in DEMO_DATASETS):
        make_demo_data(folder)
    return folder


def write_spec(folder: Path, text: str, name: str = "spec.yaml") -> Path:
    """Write a spec file (dedented) and return its path."""
    import textwrap

    path = folder / name
    path.write_text(textwrap.dedent(text).lstrip(), encoding="utf-8")
    return path


@pytest.fixture
def spec_writer(tmp_path):
    """Callable writing a spec into ``tmp_path``."""
    return lambda text, name="spec.yaml": write_spec(tmp_path, text, name)


#: The test being set up or run (fixtures it needs are built during its setup).
_CURRENT: dict = {"item": None}


def pytest_runtest_setup(item):
    _CURRENT["item"] = item


def pytest_configure(config):
    """Tests outside the statistical tier (``slow``) may not run MCMC, so the fast tier stays fast.

    PyMC's and nutpie's samplers are wrapped: called while a test without the
    marker (or a fixture it needs) is set up or run, they fail with a message saying so.
    """
    import nutpie
    import pymc

    for module in (pymc, nutpie):
        module.sample = _guarded(module.sample)


def _guarded(sample):
    def wrapper(*args, **kwargs):
        item = _CURRENT["item"]
        if item is not None and item.get_closest_marker("slow") is None:
            raise AssertionError(f"{item.nodeid} runs MCMC: mark it @pytest.mark.slow")
        return sample(*args, **kwargs)
    return wrapper
