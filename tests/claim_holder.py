"""Hold a device claim in another process, as a second pycnoctl run would (drivers/claims.py)."""

from __future__ import annotations

import contextlib
import subprocess
import sys
from collections.abc import Iterator

_HOLD = ("import sys, time\n"
         "from pycnoctl.drivers.claims import ResourceClaim\n"
         "ResourceClaim(sys.argv[1], sys.argv[2], 'holder', key=sys.argv[3] or None).take()\n"
         "print('held', flush=True)\n"
         "time.sleep(120)\n")


@contextlib.contextmanager
def held_elsewhere(kind: str, resource: str, key: str = "") -> Iterator[None]:
    """While inside, another process holds the claim (killed on the way out, which releases it)."""
    holder = subprocess.Popen([sys.executable, "-c", _HOLD, kind, resource, key], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        yield
    finally:
        holder.kill()
        holder.wait()
