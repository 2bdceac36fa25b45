"""A run opens nothing to the network unless asked: its dask servers listen on the
loopback address only and serve no web page without ``--dashboard``; with it, the
dashboard listens on the loopback address unless an address is given.

The sockets are read, while the run computes, from the operating system's table of this
process and its children (psutil ``net_connections``); a listener is probed with a plain
HTTP/1.0 request (RFC 1945, section 5: request line, then an empty line).  The loopback
network is 127.0.0.0/8 (RFC 1122, section 3.2.1.3) and ::1 (RFC 4291, section 2.5.3).
"""

from __future__ import annotations

import ipaddress
import socket
from pathlib import Path

import psutil
import pytest

from ensemble import api
from ensemble.errors import UsageError
from ensemble.run.clusters import load_profile
from ensemble.run.progress import Progress
from ensemble.run.worker_jobs import make_jobqueue_cluster
from support import REPO, run_cli, write_scenario

PAGES = ("/health", "/status", "/info/main/workers.html", "/metrics", "/json/index.html")
"""Pages dask's scheduler and workers serve when they serve any (distributed 2026.8); the
first answers at once from any of their web servers."""


def listening() -> list[tuple[str, int]]:
    """(address, port) of every TCP socket listening in this process or its children."""
    me = psutil.Process()
    found = []
    for process in (me, *me.children(recursive=True)):
        try:
            connections = process.net_connections(kind="tcp")
        except psutil.NoSuchProcess:
            continue
        found += [(c.laddr.ip, c.laddr.port) for c in connections
                  if c.status == psutil.CONN_LISTEN]
    return found


def is_loopback(address: str) -> bool:
    return ipaddress.ip_address(address).is_loopback


def http_status(address: str, port: int, page: str, wait: float) -> int | None:
    """The status of ``GET page`` on a listener, or None when it does not answer HTTP
    within ``wait`` seconds (a dask connection port, which waits for more bytes)."""
    try:
        with socket.create_connection((address, port), timeout=wait) as connection:
            connection.sendall(f"GET {page} HTTP/1.0\r\n\r\n".encode())
            reply = connection.recv(64)
    except OSError:
        return None
    if not reply.startswith(b"HTTP/"):
        return None
    return int(reply.split()[1])


def pages(address: str, port: int) -> dict[str, int | None]:
    """What a listener answers to each of :data:`PAGES` (None: it does not speak HTTP).
    A dashboard's first page may take seconds to draw on a busy machine, hence the long
    wait once the listener is known to answer HTTP."""
    first = http_status(address, port, PAGES[0], wait=2)
    if first is None:
        return dict.fromkeys(PAGES)
    return {PAGES[0]: first} | {page: http_status(address, port, page, wait=60)
                                for page in PAGES[1:]}


def sockets_during_run(tmp_path: Path, monkeypatch, **options) -> dict:
    """Run the illustrative town on a local cluster with ``options``; while its first
    chunk is being saved (the cluster is up), record the listening sockets and what each
    answers to :data:`PAGES`."""
    seen: dict = {}
    advance = Progress.advance

    def look(self, member_count: int) -> None:
        if not seen:
            seen.update({listener: pages(*listener) for listener in listening()})
        advance(self, member_count)

    monkeypatch.setattr(Progress, "advance", look)
    scenario = write_scenario(tmp_path, members=8, days=5)
    api.run(scenario, output=tmp_path / "result.nc", workers=2, progress=False,
            backend="numpy", chunk=2, **options)
    assert seen, "the run saved no chunk"
    return seen


@pytest.mark.parametrize("processes", [False, pytest.param(True, marks=pytest.mark.slow)],
                         ids=["threads", "processes"])
def test_without_dashboard_nothing_listens_beyond_loopback_or_serves_a_page(
        tmp_path: Path, monkeypatch, processes: bool) -> None:
    seen = sockets_during_run(tmp_path, monkeypatch, processes=processes)
    assert all(is_loopback(address) for address, _ in seen), sorted(seen)
    served = {listener: pages for listener, pages in seen.items()
              if any(status is not None for status in pages.values())}
    assert served, "dask's web servers were expected, serving nothing"
    for pages in served.values():
        assert set(pages.values()) == {404}, pages


@pytest.mark.parametrize("processes", [False, pytest.param(True, marks=pytest.mark.slow)],
                         ids=["threads", "processes"])
def test_the_dashboard_listens_on_loopback_only(tmp_path: Path, monkeypatch,
                                                processes: bool) -> None:
    seen = sockets_during_run(tmp_path, monkeypatch, processes=processes, dashboard=True)
    assert all(is_loopback(address) for address, _ in seen), sorted(seen)
    dashboards = [listener for listener, pages in seen.items() if pages["/status"] == 200]
    assert len(dashboards) == 1


def test_a_given_dashboard_address_is_used(tmp_path: Path, monkeypatch) -> None:
    with socket.socket() as probe:        # a port free on this machine
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    seen = sockets_during_run(tmp_path, monkeypatch, dashboard=f"127.0.0.1:{port}")
    assert seen[("127.0.0.1", port)]["/status"] == 200


@pytest.mark.parametrize("text", ["8787", "host", "127.0.0.1:99999", "a b:80",
                                  "127.0.0.1:80\ntouch pwned"])
def test_a_bad_dashboard_address_is_a_usage_error(tmp_path: Path, text: str) -> None:
    with pytest.raises(UsageError, match="--dashboard-address"):
        api.run(write_scenario(tmp_path), output=tmp_path / "r.nc", dashboard=text)
    assert not (tmp_path / "r.nc").exists() and not (tmp_path / "r.nc.partial").exists()


def test_cli_prints_the_loopback_dashboard(tmp_path: Path) -> None:
    write_scenario(tmp_path, members=4, days=5)
    done = run_cli("run", "testtown.toml", "--dashboard", "--backend", "numpy", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "dask dashboard at http://127.0.0.1:" in done.stderr
    done = run_cli("run", "testtown.toml", "--dashboard-address", "nowhere", "--force",
                   cwd=tmp_path)
    assert done.returncode == 2 and "--dashboard-address" in done.stderr


def test_batch_scheduler_serves_no_page_beyond_loopback() -> None:
    """The scheduler of batch worker jobs listens where the workers can reach it, but its
    web server (no page without a dashboard) listens on the loopback address."""
    profile = load_profile(REPO / "configs" / "testbed-slurm.toml")
    cluster = make_jobqueue_cluster(profile)   # not scaled: no job is submitted
    try:
        server = cluster.scheduler.services["dashboard"]
        assert is_loopback(server.address)
        assert set(pages(server.address, server.port).values()) == {404}
        assert "127.0.0.1:0" in cluster.job_script()   # the workers' web servers too
    finally:
        cluster.close()
