"""The optional engine (Dask distributed): importing it, reaching a scheduler, reading host labels."""
from __future__ import annotations

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
    try:
        client = distributed.Client(address, timeout=f"{timeout_s}s", set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise UserError(f"--cluster {address}: cannot reach the scheduler ({' '.join(str(exc).split())[:200]})") \
            from None
    return client, True


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
