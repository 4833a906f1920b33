"""Prefect flows: thin, scheduled wrappers around :mod:`pipeline` functions.

Importing this package sets the project's Prefect defaults (offline, no
analytics, a generous start-up timeout for the local ephemeral API) unless
the environment already sets them.
"""

import os

_DEFAULTS = {
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    "DO_NOT_TRACK": "1",
    # the ephemeral API takes ~10-15 s to start on a 2-core machine; the default 20 s can be too short under load
    "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "120",
    "PREFECT_LOGGING_LEVEL": "WARNING",
}
for _k, _v in _DEFAULTS.items():
    os.environ.setdefault(_k, _v)
