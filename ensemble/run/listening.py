"""Where the run's dask servers listen, and what their web servers show.

A dask scheduler and every dask worker always open a web server besides their own
connection port (distributed 2026.8: ``Scheduler`` listens on port 8787 of every
interface, an in-process worker on a free port of every interface), serving pages that
show the cluster's tasks, logs and call stacks to anyone who can reach them, without
authentication.  A run opens none of that to the network unless asked for:

- without a dashboard, the web servers listen on the loopback address, on a free port,
  and serve no page at all (:data:`NO_PAGES`);
- with ``--dashboard``, the scheduler's dashboard listens on the loopback address
  (reach it from another machine through an SSH tunnel) unless the user gives an address
  (``--dashboard-address HOST:PORT``, :func:`dashboard_address`).

A local cluster's own connection ports listen on the loopback address too (dask's
``LocalCluster`` default for TCP; thread workers talk in-process).
"""

from __future__ import annotations

import re
import socket

from ensemble.errors import UsageError

LOOPBACK = "127.0.0.1"
"""The IPv4 loopback address: reachable only from this machine."""

LOOPBACK_ANY_PORT = f"{LOOPBACK}:0"
"""A free port of the loopback address, as dask's ``dashboard_address`` takes it."""

NO_PAGES = {"distributed.scheduler.http.routes": [], "distributed.worker.http.routes": []}
"""dask configuration that leaves the web servers of schedulers and workers without any
page (health, metrics, information pages) while no dashboard is asked for."""

NO_PAGES_ENVIRONMENT = "DASK_DISTRIBUTED__WORKER__HTTP__ROUTES='[]'"
""":data:`NO_PAGES` for the workers of batch jobs, as an environment assignment (dask
reads ``DASK_*`` variables into its configuration)."""

_ADDRESS = re.compile(r"(?P<host>[A-Za-z0-9._-]*|\[[0-9A-Fa-f:.]+\]):(?P<port>[0-9]{1,5})")


def dashboard_address(text: str) -> str:
    """Check ``--dashboard-address HOST:PORT`` and return it as dask takes it.

    ``HOST`` is a host name, an IPv4 address or an IPv6 address in brackets; empty means
    every interface (the user's explicit choice).  ``PORT`` 0 picks a free port.

    Raises
    ------
    UsageError
        Not of that form, or a port above 65535.
    """
    found = _ADDRESS.fullmatch(text)
    if found is None or int(found["port"]) > 65535:
        raise UsageError("--dashboard-address", "", text, "expected HOST:PORT",
                         f"e.g. {LOOPBACK}:8787 (this machine only) or :8787 (every "
                         "interface)")
    return text


def dashboard_at(dashboard: bool | str) -> str | None:
    """Where the dashboard listens: None for no dashboard, the loopback address (a free
    port) for ``True``, else the given ``HOST:PORT`` (checked)."""
    if dashboard is True:
        return LOOPBACK_ANY_PORT
    if not dashboard:
        return None
    return dashboard_address(dashboard)


def served_dashboard(scheduler) -> str | None:
    """The dashboard's address as the web server of ``scheduler`` (a dask scheduler in
    this process) is bound, or None for no scheduler here.

    dask's own link names the host of the scheduler's connection address, which is not
    where the web server listens when the workers are threads (they talk in-process) or
    when a dashboard address is given.
    """
    server = getattr(scheduler, "services", {}).get("dashboard")
    if server is None:
        return None
    host = server.address
    if host in ("", "0.0.0.0", "::"):
        host = socket.gethostname()
    elif ":" in host:
        host = f"[{host}]"
    return f"http://{host}:{server.port}/status"
