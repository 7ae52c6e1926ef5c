"""Fixtures every test folder shares; the servers they start are in tests/_servers.py."""

from __future__ import annotations

import os
from collections.abc import Iterator

import pytest

from service.config import ENV_PREFIX
from tests._support.servers import TOKEN, new_id


@pytest.fixture(scope="session", autouse=True)
def _clean_environment() -> Iterator[None]:
    """Settings, and the servers tests start, read CAIRN_ variables: the tests start from none, whatever the shell has."""
    saved = {k: v for k, v in os.environ.items() if k.startswith(ENV_PREFIX)}
    for key in saved:
        del os.environ[key]
    yield
    for key in [k for k in os.environ if k.startswith(ENV_PREFIX)]:
        del os.environ[key]
    os.environ.update(saved)


@pytest.fixture(scope="session")
def sid():
    """A new session id on each call: tests that share a server never share a visit."""

    def new(tag: str = "s") -> str:
        return new_id(f"{tag}-")

    return new


@pytest.fixture(scope="session")
def token() -> str:
    """The admin token of the servers the test settings describe."""
    return TOKEN
