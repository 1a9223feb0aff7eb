"""The optional engine (Dask distributed): importing it, reaching a scheduler, reading host labels."""
from __future__ import annotations

import re
import socket

from speedbench.errors import UserError
from speedbench.fleet.task import LABEL_PREFIX, LABEL_RE, labels_of

INSTALL_HINT = "fleet sweeps need the optional engine: pip install 'speedbench[fleet]'"


def require_engine():
    """The distributed module, or a one-line UserError saying what to install."""
    try:
        import distributed
    except ImportError:
        raise UserError(INSTALL_HINT) from None
    return distributed


def connect(cluster, timeout_s: float = 20.0):
    """A Client for `cluster`: a scheduler address, a Cluster object or an existing Client."""
    distributed = require_engine()
    if isinstance(cluster, distributed.Client):
        return cluster, False
    address = getattr(cluster, "scheduler_address", cluster)
    if not isinstance(address, str) or not address.strip():
        raise UserError(f"--cluster: expected a scheduler address such as tcp://HOST:8786, got {address!r}")
    if not isinstance(cluster, str) or not address.startswith("inproc://"):
        probe(address, min(timeout_s, 4.0))
    try:
        client = distributed.Client(address, timeout=f"{timeout_s}s", set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise UserError(f"--cluster {address}: cannot reach the scheduler ({' '.join(str(exc).split())[:200]})") \
            from None
    return client, True


ADDRESS_RE = re.compile(r"(?:(tcp|tls|ws|wss|ucx)://)?(\[[0-9a-fA-F:.]+\]|[A-Za-z0-9._-]+):(\d{1,5})/?")


def check_address(address: str) -> tuple[str, str, int]:
    """(scheme, host, port) of a scheduler address [scheme://]HOST:PORT, or a one-line UserError."""
    m = ADDRESS_RE.fullmatch(address.strip())
    if not m or not 0 < int(m.group(3)) < 65536:
        raise UserError(f"--cluster: {address!r} is not a scheduler address such as tcp://HOST:8786")
    return m.group(1) or "tcp", m.group(2).strip("[]"), int(m.group(3))


def probe(address: str, timeout_s: float = 5.0) -> None:
    """Fail fast, in one line, when no scheduler answers at `address`.

    Resolves the host, then opens one connection and exchanges the engine's handshake.
    Without this the scheduler client retries for its whole timeout and, on giving up,
    its destructor prints a second TimeoutError at interpreter exit."""
    import asyncio

    from distributed.comm import connect as comm_connect

    scheme, host, port = check_address(address)
    if scheme in ("tcp", "tls"):
        try:
            socket.getaddrinfo(host, port)
        except socket.gaierror as exc:
            raise UserError(f"--cluster {address}: cannot resolve host {host!r} ({exc.strerror})") from None

    async def hello():
        comm = await comm_connect(address if "://" in address else f"tcp://{address}", timeout=timeout_s)
        await comm.close()

    try:
        asyncio.run(asyncio.wait_for(hello(), timeout_s + 1))
    except (OSError, TimeoutError, asyncio.TimeoutError) as exc:   # refused, unreachable, timed out
        why = " ".join(str(exc).split())[:160] or type(exc).__name__
        raise UserError(f"--cluster {address}: cannot reach the scheduler ({why})") from None
    except Exception:  # something answered that does not speak the scheduler's protocol
        why = "something answered there, but not a Dask scheduler"
        raise UserError(f"--cluster {address}: cannot reach the scheduler ({why})") from None


def workers_by_label(client) -> dict[str, list[dict]]:
    """Live workers grouped by the host label they advertise (resource "host:<label>")."""
    info = client.scheduler_info(n_workers=-1)
    out: dict[str, list[dict]] = {}
    for address, w in info.get("workers", {}).items():
        for label in labels_of(w.get("resources") or {}):
            out.setdefault(label, []).append({"address": address, "ip": w.get("host"), "name": w.get("name"),
                                              "nthreads": w.get("nthreads")})
    return out


def check_labels(by_label: dict, address: str, wanted=None) -> list[str]:
    """The labels to sweep on; a UserError for anything that would mix or disturb measurements."""
    if not by_label:
        raise UserError(f"--cluster {address}: no worker advertises a host label; start each host's worker "
                        f"with --resources {LABEL_PREFIX}LABEL=1")
    for label, workers in by_label.items():
        if not LABEL_RE.match(label):
            raise UserError(f"--cluster {address}: worker {workers[0]['address']} advertises host label "
                            f"{label!r}; use letters, digits, '.', '_' or '-' (it names a run directory)")
        if len(workers) > 1:
            # Two workers under one label would run two points at once, or mix two machines in one run.
            raise UserError(f"--cluster {address}: {len(workers)} workers advertise host label {label!r} "
                            f"({', '.join(w['address'] for w in workers)}); run exactly one worker per host label")
    if wanted is None:
        return sorted(by_label)
    missing = [h for h in wanted if h not in by_label]
    if missing:
        raise UserError(f"--hosts: no worker advertises host label {missing[0]!r} "
                        f"(the cluster has: {', '.join(sorted(by_label))})")
    return list(wanted)


def shared_machines(by_label: dict, labels) -> dict[str, list[str]]:
    """label -> other labels whose worker has the same IP address (the same machine, most likely)."""
    out = {}
    for label in labels:
        ip = by_label[label][0]["ip"]
        same = [other for other in labels if other != label and by_label[other][0]["ip"] == ip]
        if same:
            out[label] = same
    return out


def parse_hosts(text) -> list[str] | None:
    """'a,b' (or a list) -> ['a', 'b']; None means every label the cluster advertises."""
    if text is None:
        return None
    items = text.split(",") if isinstance(text, str) else list(text)
    labels = [str(h).strip() for h in items]
    if not labels or any(not h for h in labels):
        raise UserError(f"--hosts: {text!r} has an empty host label; give labels separated by commas")
    for h in labels:
        if not LABEL_RE.match(h):
            raise UserError(f"--hosts: {h!r} is not a host label (letters, digits, '.', '_' or '-')")
    return list(dict.fromkeys(labels))
