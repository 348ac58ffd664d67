"""Fixtures for build tests."""

import pytest

from goalkit.logs.memory import MemorySource
from pipeline_cases import make_episodes


@pytest.fixture
def episodes():
    return make_episodes()


@pytest.fixture
def source(episodes):
    return MemorySource(episodes)
