"""The client side of a fleet sweep: send each host's plan to the cluster, store results as they arrive.

Dask does the placing: every task asks for resource {"host:<label>": 1} and
each host's one worker advertises exactly one unit of it, so a host runs one
point at a time whatever else is queued. The client only writes each result
into that host's run directory the moment it arrives (as_completed), so a
killed client loses at most the points in flight, and --resume skips what each
host's run directory already holds.

When a worker dies mid-point, the scheduler re-runs the task on the host's
restarted worker (its allowed-failures budget). A task that keeps killing
workers, or a host whose label is gone for lost_after_s, gets its in-flight
point recorded as failed with the reason; the host's other points stay
unmeasured for a later --resume, and the other hosts go on.
"""
from __future__ import annotations

import socket
import sys
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import speedbench
from speedbench.errors import UserError
from speedbench.fleet import engine, task
from speedbench.sweep.pipeline import PreparedGraph, baselines, build_row, record_run_facts, stream_key
from speedbench.sweep.plan import PlannedPoint, expand_plan
from speedbench.sweep.profile import load_profile, parse_profile
from speedbench.sweep.progress import Progress
from speedbench.sweep.rundir import RunDir, now_iso
from speedbench.sweep.runner import same_study
from speedbench.measure.launch import SETTLE_S
from speedbench.sweep.schedule import planned_order

MAX_RESUBMITS = 3     # a point that never started but was caught by a worker death is sent again


@dataclass
class _Host:
    label: str
    out: Path
    setup: dict | None = None
    plan: object = None
    rd: object = None
    state: str = "setup"                          # setup -> running -> done | lost | skipped
    futures: dict = field(default_factory=dict)   # key -> (future, planned)
    kinds: dict = field(default_factory=dict)     # key -> invocation index of an invocation task ("finish": a row)
    results: dict = field(default_factory=dict)   # point id -> {invocation: stored result dict}
    finishing: dict = field(default_factory=dict)  # stream key -> finish future of the K = 1 point
    closed: set = field(default_factory=set)       # point ids whose row is being made (finish sent)
    rank: dict = field(default_factory=dict)       # (point id, invocation) -> Dask priority (its place in the order)
    fps: dict = field(default_factory=dict)       # stream key -> one-stream fps measured on this host
    resubmits: dict = field(default_factory=dict)
    last_seen: float = 0.0
    warned_gone: bool = False
    counts: dict = field(default_factory=lambda: {"ok": 0, "failed": 0, "skipped_done": 0, "unmeasured": 0})


def run_fleet_sweep(profile_path, cluster, out_dir=None, resume: bool = False, hosts=None,
                    quiet: bool = False, stream=None, lost_after_s: float = 120.0,
                    retry_failed: bool = False, poll_s: float = 0.25,
                    connect_timeout_s: float = 20.0) -> dict[str, Path]:
    """Run (or resume) a profile on every host of a Dask cluster; returns {host label: run directory}.

    cluster: scheduler address ("tcp://HOST:8786"), a dask Cluster or Client.
    hosts: labels to use ("a,b" or a list); default every label the cluster advertises.
    out_dir: parent of the per-host run directories OUT/<label>/ (default: the
    profile's run.output with {host} filled in, or run.output/<label>).
    retry_failed (with resume): measure the points stored as failed again too
    (e.g. the point a lost host had in flight); new rows replace the failed ones.
    """
    engine.require_engine()
    if retry_failed and not resume:
        raise UserError("--retry-failed: only together with --resume")
    profile = load_profile(profile_path)
    expand_plan(profile)  # profile mistakes stop here, before the cluster is touched
    wanted = engine.parse_hosts(hosts)
    client, owned = engine.connect(cluster, timeout_s=connect_timeout_s)
    try:
        return _Fleet(client, profile, out_dir, resume, wanted, quiet, stream or sys.stderr,
                      lost_after_s, poll_s, retry_failed).run()
    finally:
        if owned:
            client.close()


class _Fleet:
    def __init__(self, client, profile, out_dir, resume, wanted, quiet, stream, lost_after_s, poll_s,
                 retry_failed=False):
        self.client, self.profile, self.resume, self.retry_failed = client, profile, resume, retry_failed
        self.out_dir = Path(out_dir) if out_dir else None
        self.wanted, self.quiet, self.stream = wanted, quiet, stream
        self.lost_after_s, self.poll_s = lost_after_s, poll_s
        self.address = client.scheduler.address
        self.token = uuid.uuid4().hex[:8]
        self.running: dict[str, str] = {}     # label -> point id whose start event came last
        self.started: set = set()             # task keys (one per attempt) whose run_point began
        self.hosts: dict[str, _Host] = {}
        self.progress = None
        self._checked = 0.0                   # when the scheduler was last asked which labels are alive

    # ----------------------------------------------------------------- helpers
    def say(self, text: str) -> None:
        if self.progress is not None and self.progress.bar is not None:
            self.progress.bar.write(text, file=self.stream)
        else:
            print(text, file=self.stream, flush=True)

    def out_for(self, label: str) -> Path:
        if self.out_dir is not None:
            return self.out_dir / label
        if "{host}" in self.profile.output:
            return Path(self.profile.output.format(name=self.profile.name, host=label))
        return self.profile.output_dir() / label

    def _on_event(self, event) -> None:
        # Runs on the client's event-loop thread; plain dict/set updates are safe under the GIL.
        _, msg = event
        # Every fleet sweep on the cluster logs to the topic; only this sweep's tasks count.
        if isinstance(msg, dict) and "label" in msg and str(msg.get("key", "")).endswith(self.token):
            self.running[msg["label"]] = msg["point_id"]
            self.started.add(msg["key"])

    def _resources(self, label: str) -> dict:
        return {f"{task.LABEL_PREFIX}{label}": 1}

    # ----------------------------------------------------------------- phases
    def run(self) -> dict[str, Path]:
        by_label = engine.workers_by_label(self.client)
        labels = engine.check_labels(by_label, self.address, self.wanted)
        shared = engine.shared_machines(by_label, labels)
        for group in sorted({tuple(sorted([lb, *others])) for lb, others in shared.items()}):
            self.say(f"warning: hosts {', '.join(group)} share one machine ({by_label[group[0]][0]['ip']}): "
                     f"their points run at the same time and disturb each other; do not compare their latencies")
        now = time.monotonic()
        self.hosts = {lb: _Host(label=lb, out=self.out_for(lb), last_seen=now) for lb in labels}
        self._note_absent_runs(labels)
        self.client.subscribe_topic(task.TOPIC, self._on_event)
        try:
            self._setup(by_label, shared)
            self._measure()
        finally:
            self._cancel_all()
            self.client.unsubscribe_topic(task.TOPIC)
            for h in self.hosts.values():
                if h.rd is not None:
                    h.rd.close()
        return {lb: h.out for lb, h in self.hosts.items() if h.rd is not None}

    def _note_absent_runs(self, labels) -> None:
        if not (self.resume and self.out_dir and self.out_dir.is_dir()):
            return
        for d in sorted(self.out_dir.iterdir()):
            if (d / "meta.json").exists() and d.name not in labels:
                self.say(f"host {d.name}: has a run directory but no worker advertises it; not resumed")

    def _setup(self, by_label, shared) -> None:
        """Fingerprint + plan + dataset check on every host, then open or create each run directory."""
        p = self.profile
        futs = {lb: self.client.submit(task.host_setup, p.text, p.source, lb, key=f"speedbench-setup-{lb}-"
                                       f"{self.token}", resources=self._resources(lb), pure=False)
                for lb in self.hosts}
        pending = dict(futs)
        while pending:
            for lb, fut in list(pending.items()):
                if fut.done():
                    del pending[lb]
                    h = self.hosts[lb]
                    if fut.status == "finished":
                        h.setup = fut.result()
                    else:
                        h.state = "skipped"
                        self.say(f"host {lb}: skipped: set-up failed ({_reason(fut)})")
            for lb in self._lost(pending):
                self.client.cancel(pending.pop(lb))
                self.hosts[lb].state = "skipped"
                self.say(f"host {lb}: skipped: lost before its set-up finished")
            if pending:
                time.sleep(self.poll_s)
        for h in self.hosts.values():
            if h.setup and h.setup["error"]:
                h.state = "skipped"
                self.say(f"host {h.label}: skipped: {h.setup['error']}")
        ready = [h for h in self.hosts.values() if h.state == "setup"]
        if not ready:
            why = "; ".join(f"host {h.label}: {h.setup['error'] if h.setup else 'set-up failed or host lost'}"
                            for h in self.hosts.values())
            raise UserError(f"no host could run {self.profile.source}: {why}")
        for h in ready:            # every directory is checked before any is created
            self._check_out(h)
        for h in ready:
            h.plan = h.setup["plan"]
            h.rd = self._open(h, by_label, shared)
            h.state = "running"

    def _check_out(self, h: _Host) -> None:
        is_run = (h.out / "meta.json").exists() or (h.out / "points.sqlite").exists()
        if is_run and not self.resume:
            raise UserError(f"{h.out}: already holds a run; resume it (--resume) or choose another output directory")
        if not is_run:
            if h.out.exists() and (not h.out.is_dir() or any(h.out.iterdir())):
                raise UserError(f"{h.out}: exists and is not an empty directory; choose another output directory")
            return
        with RunDir.open(h.out, readonly=True) as rd:
            try:
                stored = parse_profile(rd.profile_text(), str(h.out / "profile.toml"))
            except UserError:
                stored = None
            env = rd.meta().get("env") or {}
        if stored is None or not same_study(stored, self.profile, ignore_host=True):
            raise UserError(f"{h.out / 'profile.toml'}: the run was started with a different profile than "
                            f"{self.profile.source}; resume with that file or start a new output directory")
        new = h.setup["env"]
        for key in ("cpu_model", "cores_logical"):
            if env.get(key) != new.get(key):
                raise UserError(f"{h.out / 'meta.json'}: env.{key}: host {h.label} was {env.get(key)!r} and is now "
                                f"{new.get(key)!r}; a label must stay on one machine: use another label or directory")

    def _open(self, h: _Host, by_label, shared):
        fleet = {"scheduler": self.address, "worker": by_label[h.label][0]["address"],
                 "worker_hostname": h.setup["hostname"], "worker_speedbench": h.setup["version"],
                 "client_hostname": socket.gethostname(), "shares_machine_with": shared.get(h.label, [])}
        if h.setup["version"] != speedbench.__version__:
            self.say(f"warning: host {h.label} runs speedbench {h.setup['version']}, "
                     f"this client {speedbench.__version__}")
        if (h.out / "meta.json").exists():
            rd = RunDir.open(h.out)
            meta = rd.meta()
            rd.update_meta(resumed=list(meta.get("resumed") or []) + [now_iso()], finished=None,
                           fleet_resumed=list(meta.get("fleet_resumed") or [])
                           + [{"at": now_iso(), **fleet, "env": h.setup["env"]}])
            return rd
        meta = {"profile_name": self.profile.name, "host": h.label, "profile_source": self.profile.source,
                "env": h.setup["env"], "fleet": fleet}
        return RunDir.create(h.out, self.profile.text, meta)

    # ----------------------------------------------------------------- measuring
    def _measure(self) -> None:
        from distributed import as_completed


        ac = as_completed(loop=self.client.loop)
        total = 0
        for h in self.hosts.values():
            if h.state != "running":
                continue
            done = h.rd.done_ids() - (h.rd.failed_ids() if self.retry_failed else set())
            todo = h.plan.missing(done)
            h.counts["skipped_done"] = len(h.plan.points) - len(todo)
            h.rd.update_meta(plan_points=len(h.plan.points), plan_notes=h.plan.notes)
            record_run_facts(h.rd, h.plan.points)
            h.fps = baselines(h.rd.rows())
            total += len(todo)
            if self.profile.invocations > 1:
                self._submit_interleaved(h, todo, done, ac)
                if not todo:
                    self._finish(h)
                continue
            first = {}
            for planned in todo:          # K = 1 points first: they are the K > 1 points' baselines
                if planned.config["concurrency"] == 1:
                    first[stream_key(planned.config)] = self._submit(h, planned, ac)
            for planned in todo:
                if planned.config["concurrency"] != 1:
                    self._submit(h, planned, ac, first.get(stream_key(planned.config)))
            del first          # the dependents hold them now; a stored result must not be kept alive
            if not todo:
                self._finish(h)
        self.progress = Progress(total, quiet=self.quiet, stream=self.stream)
        try:
            while any(h.futures for h in self.hosts.values()):
                for fut in ac.next_batch(block=False) if ac.has_ready() else []:
                    self._arrived(fut, ac)
                    # Drop our reference at once: a stored point whose result the scheduler still
                    # tracks would be measured again if its worker died later.
                    fut.release()
                fut = None
                for lb in self._lost({lb: h for lb, h in self.hosts.items() if h.futures}):
                    self._host_lost(self.hosts[lb])
                if not ac.has_ready():
                    time.sleep(self.poll_s)
        finally:
            self.progress.close()
            self.progress = None
        for h in self.hosts.values():
            if h.rd is not None:
                self._summary(h)

    def _submit(self, h: _Host, planned, ac, baseline=None):
        n = h.resubmits.get(planned.point_id, 0)
        key = f"speedbench-point-{h.label}-{planned.point_id}-{n}-{self.token}"
        kwargs = {}
        if baseline is not None and not isinstance(baseline, (int, float)):
            kwargs["baseline"] = baseline
        else:
            kwargs["baseline_fps"] = baseline if baseline is not None else h.fps.get(stream_key(planned.config))
        p = self.profile
        fut = self.client.submit(task.measure_on_host, p.text, p.source, h.label, planned, key=key,
                                 resources=self._resources(h.label), pure=False, **kwargs)
        h.futures[key] = (fut, planned)
        ac.add(fut)
        return fut

    # ----------------------------------------------------------------- interleaved invocations (R >= 2)
    def _submit_interleaved(self, h: _Host, todo, done, ac) -> None:
        """R >= 2: one task per invocation, in the order the local sweep runs them (round-robin
        over the host's points in a seeded shuffle, K = 1 points first: sweep/schedule.py's
        planned_order, recorded in the host's schedule.json). Dask runs a host's tasks one at a
        time in the order they were submitted; a point's row is made on the host (finish_on_host,
        sent ahead of the queued invocations) once its last invocation is in."""
        reps = self.profile.invocations
        if self.retry_failed:
            for pid in h.rd.failed_ids():
                h.rd.clear_invocations(pid)
        for section, pts in ((None, [p for p in h.plan.points if p.config["concurrency"] == 1]),
                             ("throughput", [p for p in todo if p.config["concurrency"] != 1])):
            if not pts:
                continue
            by_id = {p.point_id: p for p in pts}
            order, stored = planned_order(h.rd, list(by_id), reps, SETTLE_S, done, section)
            for pid, got in stored.items():
                h.results[pid] = dict(got)
                if len(got) >= reps:    # every invocation stored, no row yet (killed before it)
                    self._submit_finish(h, by_id[pid], ac)
            for pid, index in order:
                # Dask does not run a worker's queued tasks in submission order: the user
                # priority (higher first) carries the order; K = 1 passes rank above the throughput pass
                h.rank[(pid, index)] = -len(h.rank)
                self._submit_invocation(h, by_id[pid], index, ac)

    def _submit_invocation(self, h: _Host, planned, index: int, ac):
        n = h.resubmits.get((planned.point_id, index), 0)
        key = f"speedbench-inv-{h.label}-{planned.point_id}-{index}-{n}-{self.token}"
        p = self.profile
        fut = self.client.submit(task.measure_invocation_on_host, p.text, p.source, h.label, planned, index,
                                 key=key, resources=self._resources(h.label), pure=False,
                                 priority=h.rank.get((planned.point_id, index), 0))
        h.futures[key] = (fut, planned)
        h.kinds[key] = index
        ac.add(fut)

    def _submit_finish(self, h: _Host, planned, ac, outcome=None):
        pid = planned.point_id
        what = outcome if outcome is not None else [d for _, d in sorted(h.results.get(pid, {}).items())]
        sk = stream_key(planned.config)
        kwargs = {}
        if planned.config["concurrency"] != 1:
            base = h.fps.get(sk)
            if base is None and sk in h.finishing:
                kwargs["baseline"] = h.finishing[sk]
            else:
                kwargs["baseline_fps"] = base
        h.closed.add(pid)
        key = f"speedbench-finish-{h.label}-{pid}-{h.resubmits.get((pid, 'finish'), 0)}-{self.token}"
        p = self.profile
        # priority: ahead of the invocations still queued on the host, so rows arrive as points finish
        fut = self.client.submit(task.finish_on_host, p.text, p.source, h.label, planned, what, key=key,
                                 resources=self._resources(h.label), pure=False, priority=1, **kwargs)
        h.futures[key] = (fut, planned)
        h.kinds[key] = "finish"
        if planned.config["concurrency"] == 1:
            h.finishing[sk] = fut
        ac.add(fut)

    def _invocation_arrived(self, h: _Host, planned, index: int, got: dict, ac) -> None:
        pid = planned.point_id
        if pid in h.closed:
            return      # the point is closed already (it could not be measured at all)
        if "reason" in got:
            # nothing of this point can run (its graph failed): its failed row now, its other
            # invocations are not run
            mine = [key for key, (f, pp) in h.futures.items() if pp.point_id == pid and h.kinds.get(key) != "finish"]
            self.client.cancel([h.futures[key][0] for key in mine])
            for key in mine:
                h.futures.pop(key)
                h.kinds.pop(key, None)
            self._submit_finish(h, planned, ac, outcome=got["reason"])
            return
        h.rd.write_invocation(pid, index, got["result"])
        h.results.setdefault(pid, {})[index] = got["result"]
        if len(h.results[pid]) >= self.profile.invocations:
            self._submit_finish(h, planned, ac)

    def _failed_invocation(self, planned, reason: str) -> dict:
        """A lost invocation as a stored result: recorded with its reason, the point keeps the others."""
        from speedbench.measure.concurrent_result import LoadResult
        from speedbench.measure.result import PointResult

        if planned.config["concurrency"] != 1:
            return LoadResult(planned.point, int(planned.config["concurrency"]), "failed", reason).to_dict()
        return PointResult(point=planned.point, status="failed", reason=reason).to_dict()

    def _arrived(self, fut, ac) -> None:
        h = next((h for h in self.hosts.values() if fut.key in h.futures), None)
        if h is None:
            return                      # cancelled by us (host lost); nothing to store
        _, planned = h.futures.pop(fut.key)
        kind = h.kinds.pop(fut.key, None)
        if isinstance(kind, int):
            self._arrived_invocation(h, fut, planned, kind, ac)
        elif fut.status == "finished":
            got = fut.result()
            self._store(h, got["row"], got["samples"], got.get("invocations"))
        elif fut.status == "error" and _killed_worker(fut):
            if fut.key in self.started or kind == "finish":
                reason = f"host {h.label} lost during the point (its worker died while running it: {_reason(fut)})"
                self._store(h, self._failed_row(h, planned, reason), [])
            elif h.resubmits.get(planned.point_id, 0) < MAX_RESUBMITS:
                # Caught in a worker death before it ever started: not a failure of this point.
                h.resubmits[planned.point_id] = h.resubmits.get(planned.point_id, 0) + 1
                base = h.fps.get(stream_key(planned.config))
                if base is None and planned.config["concurrency"] != 1:
                    base = next((f for f, pp in h.futures.values() if pp.config["concurrency"] == 1
                                 and stream_key(pp.config) == stream_key(planned.config)), None)
                self._submit(h, planned, ac, base)
            else:
                h.counts["unmeasured"] += 1
                self.say(f"host {h.label}: {planned.label}: not measured, its host kept losing workers; "
                         f"--resume to try again")
        elif fut.status == "error":
            self._store(h, self._failed_row(h, planned, f"fleet task failed: {_reason(fut)}"), [])
        elif kind == "finish":
            h.resubmits[(planned.point_id, "finish")] = h.resubmits.get((planned.point_id, "finish"), 0) + 1
            self._submit_finish(h, planned, ac)
        else:
            h.resubmits[planned.point_id] = h.resubmits.get(planned.point_id, 0) + 1
            self._submit(h, planned, ac)   # cancelled by the scheduler, not by us: send again
        if not h.futures and h.state == "running":
            self._finish(h)

    def _arrived_invocation(self, h: _Host, fut, planned, index: int, ac) -> None:
        """An invocation task came back: stored, or (its worker died while running it, or it
        raised) recorded as a failed invocation; caught in a worker death before it started, or
        cancelled by the scheduler: sent again."""
        again = (planned.point_id, index)
        if fut.status == "finished":
            self._invocation_arrived(h, planned, index, fut.result(), ac)
        elif fut.status == "error" and (fut.key in self.started or not _killed_worker(fut)):
            reason = (f"host {h.label} lost during the invocation (its worker died while running it: {_reason(fut)})"
                      if _killed_worker(fut) else f"fleet task failed: {_reason(fut)}")
            self._invocation_arrived(h, planned, index, {"result": self._failed_invocation(planned, reason)}, ac)
        elif h.resubmits.get(again, 0) < MAX_RESUBMITS:
            h.resubmits[again] = h.resubmits.get(again, 0) + 1
            self._submit_invocation(h, planned, index, ac)
        else:
            self._invocation_arrived(h, planned, index, {"result": self._failed_invocation(
                planned, f"host {h.label} kept losing workers before the invocation started")}, ac)

    def _store(self, h: _Host, row: dict, samples, invocations=None) -> None:
        h.rd.write_point(row, samples, invocations)
        status = "ok" if row.get("status") == "ok" else "failed"
        h.counts[status] += 1
        h.fps.update(baselines([row]))
        if self.running.get(h.label) == row.get("point_id"):
            self.running.pop(h.label, None)
        label = f"{h.label}: {PlannedPoint.from_row(row).label}"
        self.progress.done(label, row)

    def _failed_row(self, h: _Host, planned, reason: str) -> dict:
        return build_row(planned, PreparedGraph(), h.label, reason=reason)

    def _lost(self, candidates: dict) -> list[str]:
        """Labels among `candidates` that no live worker has advertised for lost_after_s."""
        if not candidates or time.monotonic() - self._checked < 1.0:
            return []
        self._checked = time.monotonic()
        try:
            alive = engine.workers_by_label(self.client)
        except (OSError, TimeoutError) as exc:   # distributed's CommClosedError is an OSError
            raise UserError(f"--cluster {self.address}: lost the scheduler ({type(exc).__name__}); the points "
                            f"written so far are kept: rerun with --resume") from None
        now, out = time.monotonic(), []
        for lb in candidates:
            h = self.hosts[lb]
            if lb in alive:
                h.last_seen, h.warned_gone = now, False
            elif now - h.last_seen > self.lost_after_s:
                out.append(lb)
            elif not h.warned_gone:
                h.warned_gone = True
                self.say(f"host {lb}: no worker advertises it; waiting up to {self.lost_after_s:g} s for it")
        return out

    def _host_lost(self, h: _Host) -> None:
        pid = self.running.get(h.label)
        in_flight = next(((k, pp) for k, (f, pp) in h.futures.items() if pp.point_id == pid), None)
        if in_flight is not None:
            h.futures.pop(in_flight[0])
            reason = f"host {h.label} lost during the point (no worker for {self.lost_after_s:g} s)"
            self._store(h, self._failed_row(h, in_flight[1], reason), [])
        h.counts["unmeasured"] += len({pp.point_id for _, pp in h.futures.values()})
        self.client.cancel([f for f, _ in h.futures.values()])
        h.futures.clear()
        h.state = "lost"
        h.rd.update_meta(fleet_lost=f"no worker for {self.lost_after_s:g} s")
        self.say(f"host {h.label}: lost; {h.counts['unmeasured']} point(s) not measured: "
                 f"rerun with --resume when it is back")

    def _finish(self, h: _Host) -> None:
        h.state = "done"
        if not h.plan.missing(h.rd.done_ids()):
            h.rd.finish()

    def _summary(self, h: _Host) -> None:
        c = h.counts
        text = f"host {h.label}: {h.out}: {c['ok']} ok, {c['failed']} failed"
        if c["skipped_done"]:
            text += f", {c['skipped_done']} already measured"
        if c["unmeasured"]:
            text += f", {c['unmeasured']} not measured ({h.state})"
        self.say(text)

    def _cancel_all(self) -> None:
        # On an interrupt or error: nothing queued keeps running for a client that is gone.
        futs = [f for h in self.hosts.values() for f, _ in h.futures.values()]
        if futs:
            try:
                self.client.cancel(futs)
            except Exception:  # the scheduler may be gone too; the results written are kept either way
                pass


def _killed_worker(fut) -> bool:
    from distributed.scheduler import KilledWorker

    try:
        return isinstance(fut.exception(timeout=5), KilledWorker)
    except Exception:
        return False


def _reason(fut) -> str:
    try:
        exc = fut.exception(timeout=5)
    except Exception as err:  # cancelled futures have no exception to read
        return type(err).__name__
    return " ".join(f"{type(exc).__name__}: {exc}".split())[:300]
