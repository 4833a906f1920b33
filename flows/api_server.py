"""A local Prefect API server that orchestrated runs reuse, and the check runs make before using one.

Without ``PREFECT_API_URL`` every orchestrated command starts Prefect's *ephemeral* API in its
own process (a database migration check and a web application start-up, about 10-15 s on a
2-core machine) and stops it at exit.  ``takeup api-server`` starts ``prefect server start`` once,
bound to ``127.0.0.1`` on a chosen port, waits until it answers, and prints the
``PREFECT_API_URL`` to export; later ``takeup run --orchestrated`` / ``takeup demo`` /
``takeup serve`` commands then talk to it over HTTP and skip the start-up.  The ephemeral API
stays the fallback when the variable is unset.

The server is Prefect's own command, run as a child process.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

from takeup.pipeline.errors import RunnerError

__all__ = ["api_url", "api_is_up", "start_api_server", "wait_until_up", "check_configured_api",
           "DEFAULT_HOST", "DEFAULT_PORT"]

DEFAULT_HOST = "127.0.0.1"
#: default port of the local server (Prefect's own default, 4200)
DEFAULT_PORT = 4200

#: environment of the server process: offline, no analytics (set unless the caller's environment sets them)
_SERVER_ENV = {"PREFECT_SERVER_ANALYTICS_ENABLED": "false", "DO_NOT_TRACK": "1",
               "PREFECT_UI_ENABLED": "false"}


def api_url(host: str = DEFAULT_HOST, port: int = DEFAULT_PORT) -> str:
    """``http://HOST:PORT/api``, the value of ``PREFECT_API_URL`` for a server on HOST:PORT."""
    return f"http://{host}:{int(port)}/api"


def api_is_up(url: str, timeout: float = 2.0) -> bool:
    """Whether the Prefect API at ``url`` answers its health check (``GET {url}/health``)."""
    try:
        with urllib.request.urlopen(url.rstrip("/") + "/health", timeout=timeout) as resp:  # noqa: S310 (local URL)
            return resp.status == 200
    except (urllib.error.URLError, OSError, ValueError):
        return False


def _prefect_command() -> list[str]:
    """The ``prefect`` console script of this interpreter's environment (then ``PATH``)."""
    beside = Path(sys.executable).with_name("prefect")
    if beside.exists():
        return [str(beside)]
    found = shutil.which("prefect")
    if found:
        return [found]
    raise RunnerError("the 'prefect' command was not found next to this Python nor on PATH")


def start_api_server(host: str = DEFAULT_HOST, port: int = DEFAULT_PORT, *, log_path: Path | None = None
                     ) -> subprocess.Popen:
    """Start ``prefect server start --host HOST --port PORT`` as a child process (not waited for).

    Refuses when something already answers on the port (a server there is reused as it is).
    Output goes to ``log_path`` (default: discarded).
    """
    url = api_url(host, port)
    if api_is_up(url):
        raise RunnerError(f"a Prefect API already answers at {url}; reuse it: export PREFECT_API_URL={url}")
    env = dict(os.environ)
    for k, v in _SERVER_ENV.items():
        env.setdefault(k, v)
    env.pop("PREFECT_API_URL", None)       # the server itself must not point at another API
    out = open(log_path, "ab") if log_path is not None else subprocess.DEVNULL  # noqa: SIM115 (child keeps it)
    try:
        return subprocess.Popen([*_prefect_command(), "server", "start", "--host", host, "--port", str(int(port))],
                                stdout=out, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, env=env)
    finally:
        if out is not subprocess.DEVNULL:
            out.close()


def wait_until_up(process: subprocess.Popen, url: str, timeout: float = 120.0) -> None:
    """Wait until the API at ``url`` answers; raise if the process exits or ``timeout`` passes."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if api_is_up(url, timeout=1.0):
            return
        if process.poll() is not None:
            raise RunnerError(f"the Prefect server exited with status {process.returncode} before answering at "
                              f"{url} (is the port in use by another program?)")
        time.sleep(0.25)
    raise RunnerError(f"the Prefect server did not answer at {url} within {timeout:.0f} s")


def check_configured_api(timeout: float = 5.0) -> str | None:
    """The ``PREFECT_API_URL`` a run will use, after checking that it answers (None: ephemeral API).

    Raises
    ------
    RunnerError
        When the variable is set but nothing answers there (instead of a long hang in Prefect's
        client): start the server (``takeup api-server``) or unset the variable.
    """
    url = os.environ.get("PREFECT_API_URL", "").strip()
    if not url:
        from prefect.settings import PREFECT_API_URL    # a Prefect profile or a test harness may set it
        url = (PREFECT_API_URL.value() or "").strip()
    if not url:
        return None
    if not api_is_up(url, timeout=timeout):
        raise RunnerError(f"PREFECT_API_URL={url} does not answer; start a local server with "
                          "'takeup api-server' or unset PREFECT_API_URL to use the ephemeral API")
    return url
