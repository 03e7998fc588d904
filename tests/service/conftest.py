"""Fixtures for the solver service tests: a server on loopback in a thread, and a client of it."""

from __future__ import annotations

import pytest

from service_support import ServerThread


@pytest.fixture(scope="module")
def live(tmp_path_factory):
    srv = ServerThread(tmp_path_factory.mktemp("svc"))
    yield srv
    srv.stop()


@pytest.fixture
def client(live):
    from isoclay.client import SolverClient

    c = SolverClient(live.connection, timeout_s=3.0, retries=1)
    yield c
    c.close()
