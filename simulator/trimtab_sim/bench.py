"""``trimtab-sim bench``: trimtab measured against the transport's own ceiling, in one run.

Everything runs on this machine, in one invocation, so the ratios compare like with like:

* through a private Mosquitto on 127.0.0.1 — a bare paho-mqtt echo process (the most a
  Python MQTT process does per message) and ``trimtab run`` on the same payloads, at QoS 0
  and QoS 1: sustained throughput with nothing lost, and latency at a fixed offered rate
  (:mod:`trimtab_sim.bench_transport`); echo and daemon runs alternate, round after round,
  and the median round is reported, so a disturbance from other work hits both alike;
* the engine alone beside river's ``LinearRegression`` (:mod:`trimtab_sim.bench_engine`);
* ``trimtab replay`` on the simulator's demo scenario, as a child process;
* memory per sensor, checkpoint time and restart time, each in a clean child process
  (:mod:`trimtab_sim.bench_state`).

Targets are ratios from this run; absolute figures are context for the machine they ran on.
"""

from __future__ import annotations

import json
import os
import platform
import re
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path
from typing import Any

from trimtab.errors import TrimtabError
from trimtab_sim.bench_engine import engine_figures, model_figures
from trimtab_sim.bench_state import bench_config
from trimtab_sim.bench_transport import RunResult, run_latency, run_throughput
from trimtab_sim.broker import PrivateBroker
from trimtab_sim.demo import demo_config, embedded
from trimtab_sim.generate import write_stream
from trimtab_sim.scenario import load_scenario

TARGETS = {
    "throughput_ratio": 0.95,
    "p99_ms": 2.0,
    "update_ratio_4": 2.0,
    "replay_events_per_s": 300_000.0,
    "bytes_per_sensor": 8192.0,
    "restart_10k_s": 1.0,
}
"""The issue's targets: ratios daemon/echo and trimtab/river, and absolute bounds."""

LATENCY_RATE = 2000.0


@dataclass(frozen=True, slots=True)
class Plan:
    """How much of everything one bench run does."""

    messages: int
    rounds: int
    latency_seconds: float
    engine_samples: int
    replay_days: float | None
    memory_sizes: tuple[int, ...]
    restart_sensors: int

    @classmethod
    def full(cls) -> Plan:
        return cls(40_000, 3, 5.0, 20_000, None, (1_000, 10_000, 100_000), 10_000)

    @classmethod
    def quick(cls) -> Plan:
        return cls(2_000, 1, 1.0, 2_000, 2.0, (1_000,), 1_000)


Say = Callable[[str], None]


def machine() -> dict[str, Any]:
    """What the figures ran on: CPU model, cores, Python, Mosquitto."""
    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mosq = "unknown"
    binary = shutil.which("mosquitto")
    if binary is not None:
        proc = subprocess.run([binary, "-h"], capture_output=True, text=True, timeout=10,
                              check=False)
        found = re.search(r"mosquitto version (\S+)", proc.stdout + proc.stderr)
        mosq = found.group(1) if found else "unknown"
    river_version: str | None
    try:
        river_version = metadata.version("river")
    except metadata.PackageNotFoundError:
        river_version = None
    return {"cpu": cpu, "cores": os.cpu_count(), "python": platform.python_version(),
            "mosquitto": mosq, "river": river_version, "system": platform.platform(),
            "load_average": list(os.getloadavg())}


def _pct(sorted_values: tuple[float, ...] | list[float], q: float) -> float:
    if not sorted_values:
        return float("nan")
    i = min(len(sorted_values) - 1, max(0, round(q * (len(sorted_values) - 1))))
    return sorted_values[i]


def _transport(port: int, workdir: Path, plan: Plan, say: Say) -> dict[str, Any]:
    results: list[RunResult] = []
    run_no = 0
    timeout = 60.0 + plan.messages / 500.0
    for rnd in range(plan.rounds):
        for qos in (0, 1):
            for kind in ("echo", "daemon"):
                run_no += 1
                r = run_throughput(kind, qos, port=port, workdir=workdir,
                                   prefix=f"tp{run_no}", n=plan.messages, timeout=timeout)
                say(f"round {rnd + 1}: {kind:6s} QoS {qos} throughput {r.rate_out:9,.0f}/s out"
                    f" (lost {r.lost}, duplicates {r.duplicates})")
                results.append(r)
            for kind in ("echo", "daemon"):
                run_no += 1
                r = run_latency(kind, qos, port=port, workdir=workdir, prefix=f"lat{run_no}",
                                rate=LATENCY_RATE, seconds=plan.latency_seconds, timeout=30.0)
                say(f"round {rnd + 1}: {kind:6s} QoS {qos} latency p99 "
                    f"{_pct(r.latencies, 0.99) * 1e3:6.2f} ms (lost {r.lost})")
                results.append(r)
    out: dict[str, Any] = {"runs": [], "throughput": {}, "latency": {}}
    for r in results:
        out["runs"].append({"target": r.target, "qos": r.qos, "mode": r.mode, "sent": r.sent,
                            "expected": r.expected, "received": r.received, "lost": r.lost,
                            "duplicates": r.duplicates, "seconds": r.seconds})
    for qos in (0, 1):
        tp: dict[str, Any] = {}
        for kind in ("echo", "daemon"):
            runs = [r for r in results if r.mode == "throughput" and r.qos == qos
                    and r.target == kind]
            tp[kind] = {"in": statistics.median(r.rate_in for r in runs),
                        "out": statistics.median(r.rate_out for r in runs)}
            # Per round, then the median round (as for throughput): one round disturbed by
            # other work on the machine does not decide the figure; the max is over all.
            lat_runs = [r.latencies for r in results if r.mode == "latency" and r.qos == qos
                        and r.target == kind]
            out["latency"].setdefault(str(qos), {})[kind] = {
                "p50_ms": statistics.median(_pct(x, 0.50) for x in lat_runs) * 1e3,
                "p99_ms": statistics.median(_pct(x, 0.99) for x in lat_runs) * 1e3,
                "p99_rounds_ms": [_pct(x, 0.99) * 1e3 for x in lat_runs],
                "max_ms": max((x[-1] for x in lat_runs if x), default=float("nan")) * 1e3,
                "samples": sum(len(x) for x in lat_runs)}
        # The ratio of each round's pair, then the median: both ran back to back.
        pairs = [(d.rate_out / e.rate_out) for e, d in zip(
            [r for r in results if r.mode == "throughput" and r.qos == qos and r.target == "echo"],
            [r for r in results if r.mode == "throughput" and r.qos == qos
             and r.target == "daemon"], strict=True) if e.rate_out > 0]
        tp["ratio"] = statistics.median(pairs) if pairs else 0.0
        out["throughput"][str(qos)] = tp
    out["lost"] = sum(r.lost for r in results)
    out["duplicates"] = sum(r.duplicates for r in results)
    return out


def _engine(plan: Plan, workdir: Path, say: Say) -> dict[str, Any]:
    out: dict[str, Any] = {"river": None}
    for terms in (4, 16):
        ours, theirs = model_figures(terms, plan.engine_samples)
        row: dict[str, Any] = {"trimtab": {"predict": ours.predict, "update": ours.update}}
        if theirs is not None:
            assert ours.update and theirs.update and ours.predict and theirs.predict
            row["river"] = {"predict": theirs.predict, "update": theirs.update}
            row["update_ratio"] = ours.update / theirs.update
            row["predict_ratio"] = ours.predict / theirs.predict
            out["river"] = True
        out[str(terms)] = row
        say(f"model at {terms} terms: {ours.update:,.0f} updates/s"
            + ("" if theirs is None else f", river {theirs.update:,.0f}/s")
            + ("" if theirs is not None else " (river not installed)"))
    if out["river"] is None:
        out["river"] = False
    cfg = bench_config(workdir / "engine")
    eng = engine_figures(cfg, plan.engine_samples)
    out["engine"] = {"readings": eng.predict, "references": eng.update}
    say(f"engine: {eng.predict:,.0f} readings/s, {eng.update:,.0f} references/s")
    return out


def _replay(plan: Plan, workdir: Path, say: Say) -> dict[str, Any]:
    d = workdir / "replay"
    d.mkdir(parents=True, exist_ok=True)
    scenario = embedded("demo-scenario.toml")
    stream = d / "stream.jsonl"
    write_stream(load_scenario(scenario), stream, 0)
    if plan.replay_days is not None:
        lines = stream.read_text().splitlines(keepends=True)
        first_t = json.loads(lines[0])["t"]
        keep = [ln for ln in lines if json.loads(ln)["t"] < first_t + plan.replay_days * 86400]
        stream.write_text("".join(keep))
    cfg = demo_config(embedded("demo-daemon.toml"), d, 1883, "5")
    best: dict[str, Any] | None = None
    for _ in range(max(1, plan.rounds)):
        proc = subprocess.run(
            [sys.executable, "-m", "trimtab.cli", "replay", "-c", str(cfg), str(stream),
             "-o", os.devnull, "--json"], capture_output=True, text=True, timeout=600,
            check=False)
        try:
            summary = json.loads(proc.stderr.strip().splitlines()[-1])
        except (IndexError, json.JSONDecodeError):
            summary = None
        if proc.returncode != 0 or not isinstance(summary, dict):
            raise TrimtabError(f"bench: trimtab replay failed ({proc.returncode}): "
                               f"{proc.stderr[-500:]}")
        events, seconds = int(summary["events"]), float(summary["seconds"])
        rate = events / max(seconds, 1e-9)
        if best is None or rate > best["events_per_s"]:
            best = {"events": events, "corrected": int(summary["corrected"]),
                    "seconds": seconds, "events_per_s": rate}
    assert best is not None
    say(f"replay: {best['events_per_s']:,.0f} events/s ({best['events']:,} events)")
    return best


def _child(args: list[str], timeout: float) -> dict[str, Any]:
    proc = subprocess.run([sys.executable, "-m", "trimtab_sim.bench_state", *args],
                          capture_output=True, text=True, timeout=timeout, check=False)
    if proc.returncode != 0:
        raise TrimtabError(f"bench: {' '.join(args[:2])} failed: {proc.stderr[-800:]}")
    result: dict[str, Any] = json.loads(proc.stdout.strip().splitlines()[-1])
    return result


def _state(plan: Plan, workdir: Path, say: Say) -> dict[str, Any]:
    out: dict[str, Any] = {"memory": []}
    for inputs in (3, 1):
        for n in plan.memory_sizes:
            row: dict[str, Any] = {"sensors": n, "inputs": inputs}
            for mode in ("rss", "traced"):
                r = _child(["memory", str(n), mode, str(inputs), str(workdir / "memory")],
                           timeout=1800)
                row[mode] = r["per_sensor"]
                row["buffer_rows"] = r["buffer_rows"]
            out["memory"].append(row)
            say(f"memory: {n:,} sensors of {inputs} input(s): {row['traced']:,.0f} B/sensor "
                f"allocated, {row['rss']:,.0f} B/sensor resident")
    d = workdir / "restart"
    shutil.rmtree(d, ignore_errors=True)
    n = plan.restart_sensors
    cp = _child(["checkpoint", str(n), str(d)], timeout=1800)
    rs = _child(["restart", str(d)], timeout=1800)
    if rs["sensors"] != n:
        raise TrimtabError(f"bench: restart loaded {rs['sensors']} sensors, not {n}")
    out["checkpoint"] = cp
    out["restart"] = rs
    say(f"checkpoint of {n:,} sensors: {cp['seconds']:.2f} s ({cp['bytes'] / 1e6:,.1f} MB); "
        f"restart: {rs['seconds']:.2f} s")
    return out


def run_bench(*, quick: bool = False, workdir: Path | None = None,
              say: Say | None = None) -> dict[str, Any]:
    """Run every measurement and return the figures (see :func:`format_table`)."""
    plan = Plan.quick() if quick else Plan.full()
    say = say or (lambda msg: print(f"bench: {msg}", file=sys.stderr, flush=True))
    own = workdir is None
    root = Path(tempfile.mkdtemp(prefix="trimtab-bench-")) if workdir is None else workdir
    root.mkdir(parents=True, exist_ok=True)
    started = time.monotonic()
    result: dict[str, Any] = {"quick": quick, "machine": machine(), "targets": TARGETS,
                              "plan": {"messages": plan.messages, "rounds": plan.rounds,
                                       "latency_rate": LATENCY_RATE,
                                       "latency_seconds": plan.latency_seconds,
                                       "engine_samples": plan.engine_samples}}
    try:
        broker = PrivateBroker(root / "broker", persistence=False).start()
        try:
            say(f"private Mosquitto on 127.0.0.1:{broker.port}")
            result["transport"] = _transport(broker.port, root / "runs", plan, say)
        finally:
            broker.stop()
        result["engine"] = _engine(plan, root, say)
        result["replay"] = _replay(plan, root, say)
        result.update(_state(plan, root, say))
    finally:
        if own:
            shutil.rmtree(root, ignore_errors=True)
    result["seconds"] = time.monotonic() - started
    result["verdicts"] = verdicts(result)
    return result


def verdicts(r: dict[str, Any]) -> dict[str, bool]:
    """Each target: met or not, from this run's figures."""
    t = r["targets"]
    tp, lat, eng = r["transport"]["throughput"], r["transport"]["latency"], r["engine"]
    out = {
        "throughput_qos0": tp["0"]["ratio"] >= t["throughput_ratio"],
        "throughput_qos1": tp["1"]["ratio"] >= t["throughput_ratio"],
        "p99_qos0": lat["0"]["daemon"]["p99_ms"] <= t["p99_ms"],
        "p99_qos1": lat["1"]["daemon"]["p99_ms"] <= t["p99_ms"],
        "replay": r["replay"]["events_per_s"] >= t["replay_events_per_s"],
        "nothing_lost": r["transport"]["lost"] == 0 and r["transport"]["duplicates"] == 0,
    }
    if eng["river"]:
        out["update_vs_river"] = eng["4"]["update_ratio"] >= t["update_ratio_4"]
    for row in r["memory"]:
        out[f"memory_{row['inputs']}in_{row['sensors']}"] = (
            max(row["traced"], row["rss"]) <= t["bytes_per_sensor"])
    out["restart"] = r["restart"]["seconds"] <= t["restart_10k_s"]
    return out


def _ok(flag: bool) -> str:
    return "met" if flag else "MISSED"


def format_table(r: dict[str, Any]) -> str:
    """The figures as a Markdown table, with the machine and each target's verdict."""
    m, t, v = r["machine"], r["targets"], r["verdicts"]
    tp, lat, eng = r["transport"]["throughput"], r["transport"]["latency"], r["engine"]
    lines = [
        f"Machine: {m['cpu']}, {m['cores']} cores, Python {m['python']}, Mosquitto "
        f"{m['mosquitto']}, river {m['river'] or 'not installed'}; load average at start "
        f"{', '.join(f'{x:.2f}' for x in m['load_average'])}.",
        f"Run: {'quick' if r['quick'] else 'full'}, {r['plan']['messages']:,} messages a "
        f"throughput run, {r['plan']['rounds']} round(s), {r['seconds']:.0f} s in all; "
        f"lost {r['transport']['lost']}, duplicates {r['transport']['duplicates']}.",
        "",
        "| measure | bare paho echo | trimtab | ratio | target | |",
        "|---|---:|---:|---:|---|---|",
    ]
    for q in ("0", "1"):
        e, d = tp[q]["echo"], tp[q]["daemon"]
        lines.append(f"| throughput QoS {q} (msgs/s in / out) | {e['in']:,.0f} / {e['out']:,.0f}"
                     f" | {d['in']:,.0f} / {d['out']:,.0f} | {tp[q]['ratio']:.2f} | "
                     f"≥ {t['throughput_ratio']} × echo | {_ok(v[f'throughput_qos{q}'])} |")
    for q in ("0", "1"):
        e, d = lat[q]["echo"], lat[q]["daemon"]
        lines.append(f"| latency QoS {q} at {r['plan']['latency_rate']:,.0f}/s, p50 / p99 / max "
                     f"(ms; median round, max of all) | "
                     f"{e['p50_ms']:.2f} / {e['p99_ms']:.2f} / {e['max_ms']:.1f} | "
                     f"{d['p50_ms']:.2f} / {d['p99_ms']:.2f} / {d['max_ms']:.1f} | "
                     f"{d['p99_ms'] / e['p99_ms']:.2f} | p99 ≤ {t['p99_ms']} ms | "
                     f"{_ok(v[f'p99_qos{q}'])} |")
    lines += ["", "| engine alone (ops/s) | river LinearRegression | trimtab | ratio | target | |",
              "|---|---:|---:|---:|---|---|"]
    for terms in ("4", "16"):
        row = eng[terms]
        for op in ("update", "predict"):
            river = row.get("river")
            theirs = f"{river[op]:,.0f}" if river else "river not installed"
            ratio = f"{row[f'{op}_ratio']:.2f}" if river else "–"
            target, verdict = "", ""
            if terms == "4" and op == "update":
                target = f"≥ {t['update_ratio_4']} × river"
                verdict = _ok(v["update_vs_river"]) if "update_vs_river" in v else "skipped"
            lines.append(f"| {op}, {terms} terms | {theirs} | {row['trimtab'][op]:,.0f} | "
                         f"{ratio} | {target} | {verdict} |")
    lines.append(f"| Engine: readings → corrected (4 terms) | | {eng['engine']['readings']:,.0f}"
                 " | | | |")
    lines.append(f"| Engine: references → update (4 terms) | | "
                 f"{eng['engine']['references']:,.0f} | | | |")
    rp = r["replay"]
    lines += ["", "| offline and state | figure | target | |", "|---|---:|---|---|",
              f"| `trimtab replay`, demo scenario ({rp['events']:,} events) | "
              f"{rp['events_per_s']:,.0f} events/s | ≥ {t['replay_events_per_s']:,.0f} | "
              f"{_ok(v['replay'])} |"]
    for row in r["memory"]:
        key = f"memory_{row['inputs']}in_{row['sensors']}"
        lines.append(f"| memory, {row['sensors']:,} sensors × {row['inputs']} input(s), "
                     f"{row['buffer_rows']} buffered readings each (allocated / resident) | "
                     f"{row['traced']:,.0f} / {row['rss']:,.0f} B per sensor | "
                     f"≤ {t['bytes_per_sensor']:,.0f} B | {_ok(v[key])} |")
    cp, rs = r["checkpoint"], r["restart"]
    lines.append(f"| checkpoint, {cp['sensors']:,} sensors ({cp['bytes'] / 1e6:,.1f} MB) | "
                 f"{cp['seconds']:.2f} s | | |")
    lines.append(f"| restart, {rs['sensors']:,} sensors (load {rs['load_seconds']:.2f} s + "
                 f"engine {rs['engine_seconds']:.2f} s) | {rs['seconds']:.2f} s | "
                 f"≤ {t['restart_10k_s']} s at 10,000 | {_ok(v['restart'])} |")
    return "\n".join(lines)


__all__ = ["TARGETS", "Plan", "format_table", "machine", "run_bench", "verdicts"]
