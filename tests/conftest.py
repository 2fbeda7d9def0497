"""Shared fixtures: one small synthetic archive and one store built from it per session.

The synthetic archive is demo data (reanalysis_demo), used to exercise the pipeline end to
end; correctness checks compare against outside references named in each test.
"""

from pathlib import Path

import pytest

DEMO_YEARS = 4
DEMO_SEED = 11


@pytest.fixture(scope="session")
def demo_dir(tmp_path_factory) -> Path:
    import reanalysis_demo
    out = tmp_path_factory.mktemp("demo")
    reanalysis_demo.write_archive(out, years=DEMO_YEARS, seed=DEMO_SEED, progress=False)
    return out


@pytest.fixture(scope="session")
def demo_files(demo_dir) -> list[Path]:
    return sorted((demo_dir / "archive").glob("*.nc"))


@pytest.fixture(scope="session")
def demo_store(demo_dir, demo_files):
    import reanalysis_demo
    from analogs.api import build_store
    from analogs.stages.outcomes import Region
    return build_store(demo_files, demo_dir / "store", events=demo_dir / "events.csv",
                       region=Region.box(*reanalysis_demo.CENTRAL_REGION), progress=False)


@pytest.fixture(scope="session")
def default_demo_years():
    """The default demo's archive in memory: ten years from 2001, seed 0, 1 degree."""
    import reanalysis_demo

    return reanalysis_demo.generate(10)
