"""First run after install: what numba compiles, and how long a cold and a warm run take.

Runs a galerkit command (default ``demo``) in a child process whose numba cache is a
fresh temporary folder (cold), then again on that same folder (warm), and prints per
run: wall seconds, compile seconds, and every kernel signature compiled with its
seconds (numba's ``numba:compile`` events; nested compiles are charged to the
kernel that triggered them and also listed on their own).

    .venv/bin/python benchmarks/cold_start.py                 # demo, cold then warm
    .venv/bin/python benchmarks/cold_start.py --repeat 3      # min over 3 cold/warm pairs
    .venv/bin/python benchmarks/cold_start.py -- warm-up      # any galerkit command
    .venv/bin/python benchmarks/cold_start.py --top 50 -- demo --size 300

Other work on the machine slows compilation; the load average is printed with each
run and the minimum over repeats is the figure to quote.  The CPU seconds of the
main process (``cpu_s``, ``compile_cpu_s``) change less with the load: compare
those when the machine is busy.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

CHILD = r"""
import json, os, sys, time
from numba.core import event

records, stack = [], []

class L(event.Listener):
    def on_start(self, ev):
        d = ev.data or {}
        disp = d.get("dispatcher")
        name = getattr(getattr(disp, "py_func", None), "__qualname__", repr(disp))
        mod = getattr(getattr(disp, "py_func", None), "__module__", "?")
        sig = ",".join(str(a) for a in d.get("args", ()))
        stack.append([mod.rsplit(".", 1)[-1] + "." + name, sig, time.perf_counter(), 0.0,
                      len(stack), time.process_time()])

    def on_end(self, ev):
        name, sig, t0, child, depth, c0 = stack.pop()
        dt = time.perf_counter() - t0
        if stack:
            stack[-1][3] += dt
        records.append({"kernel": name, "sig": sig, "seconds": dt, "self": dt - child,
                        "depth": depth, "cpu": time.process_time() - c0})

event.register("numba:compile", L())
t0 = time.perf_counter()
from galerkit.bindings.command.cli import main
try:
    rc = main(sys.argv[1:])
finally:
    wall = time.perf_counter() - t0
    with open(os.environ["COLD_START_OUT"], "w") as f:
        json.dump({"wall": wall, "cpu": time.process_time(), "records": records}, f)
sys.exit(rc)
"""


def run_once(command, cache, env_extra=None):
    out = os.path.join(cache, f"record-{time.time_ns()}.json")
    env = dict(os.environ, NUMBA_CACHE_DIR=os.path.join(cache, "numba"), COLD_START_OUT=out)
    env.pop("GALERKIT_CACHE_DIR", None)
    env.update(env_extra or {})
    load = os.getloadavg()[0]
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", CHILD, *command], env=env,
                          capture_output=True, text=True)
    elapsed = time.perf_counter() - t0
    if proc.returncode != 0:
        sys.stderr.write(proc.stdout + proc.stderr)
        raise SystemExit(f"cold_start: `galerkit {' '.join(command)}` failed ({proc.returncode})")
    with open(out) as f:
        rec = json.load(f)
    rec["process"] = elapsed
    rec["load"] = load
    rec["stdout"] = proc.stdout
    rec["stderr"] = proc.stderr
    return rec


def wait_for_second_process(cache, timeout=300.0):
    """Wait until no process compiles into ``cache`` any more; the seconds waited.

    The command line's second process (``galerkit.compilation``) may still be
    in its second stage (the parallel solve loop) when the cold run ends; it
    finishes that compile for the next run.  The warm run is the one after it:
    started at once, it would find the loop missing and compile it again.
    Linux (``/proc``); elsewhere nothing is waited for.
    """
    folder = os.path.join(cache, "numba").encode()
    t0 = time.perf_counter()
    while time.perf_counter() - t0 < timeout:
        busy = False
        for pid in os.listdir("/proc") if os.path.isdir("/proc") else []:
            if not pid.isdigit() or int(pid) == os.getpid():
                continue
            try:
                with open(f"/proc/{pid}/environ", "rb") as f:
                    if b"NUMBA_CACHE_DIR=" + folder + b"\0" in f.read() + b"\0":
                        busy = True
                        break
            except OSError:  # ended meanwhile, or not ours to read
                continue
        if not busy:
            break
        time.sleep(0.2)
    return time.perf_counter() - t0


def summary(rec):
    top = [r for r in rec["records"] if r["depth"] == 0]
    # the command's own report line ("compile  12.3 s ..."), waits for the second
    # process included; None when the run compiled nothing
    said = [ln.split()[1] for ln in rec["stdout"].splitlines() if ln.split()[:1] == ["compile"]]
    return {"process_s": round(rec["process"], 2), "wall_s": round(rec["wall"], 2),
            "reported_compile_s": float(said[0]) if said else None,
            "compile_s": round(sum(r["seconds"] for r in top), 2),
            # CPU seconds of this process: compiling, and in all (imports included);
            # less sensitive to other work on the machine than wall seconds
            "compile_cpu_s": round(sum(r.get("cpu", 0.0) for r in top), 2),
            "cpu_s": round(rec.get("cpu", 0.0), 2),
            "signatures": len(rec["records"]), "outermost": len(top),
            "load": round(rec["load"], 2)}


def table(rec, n):
    rows = sorted(rec["records"], key=lambda r: -r["self"])
    lines = [f"  {'self s':>7s} {'incl s':>7s}  kernel (signature)"]
    for r in rows[:n]:
        sig = r["sig"] if len(r["sig"]) < 110 else r["sig"][:107] + "..."
        lines.append(f"  {r['self']:7.2f} {r['seconds']:7.2f}  {'  ' * r['depth']}{r['kernel']}({sig})")
    if len(rows) > n:
        lines.append(f"  ... {len(rows) - n} more, {sum(r['self'] for r in rows[n:]):.2f} s self")
    return "\n".join(lines)


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--repeat", type=int, default=1, help="cold/warm pairs (min is reported)")
    p.add_argument("--top", type=int, default=25, help="kernels listed per cold run")
    p.add_argument("--json", action="store_true", help="print the summaries as JSON")
    p.add_argument("--save", help="write every compile record of every run to this JSON file")
    p.add_argument("command", nargs="*", default=["demo", "--quiet"])
    a = p.parse_args(argv)
    cmd = a.command or ["demo", "--quiet"]
    if a.save:
        a.save = os.path.abspath(a.save)
    results = []
    with tempfile.TemporaryDirectory(prefix="galerkit-cold-") as tmp:
        os.chdir(tmp)  # outputs (galerkit-out/) land in the temporary folder
        for i in range(a.repeat):
            cache = os.path.join(tmp, f"cache{i}")
            os.makedirs(cache)
            cold = run_once(cmd, cache)
            tail = wait_for_second_process(cache)
            warm = run_once(cmd, cache)
            results.append({"cold": summary(cold), "warm": summary(warm),
                            "records": {"cold": cold["records"], "warm": warm["records"]}})
            if not a.json:
                print(f"run {i + 1}: galerkit {' '.join(cmd)}")
                print(f"  cold {summary(cold)}")
                print(f"  the second process went on compiling for {tail:.1f} s after the "
                      "cold run ended (its second stage, for the next run); then the warm run")
                print(table(cold, a.top))
                print(f"  warm {summary(warm)}")
                if warm["records"]:
                    print(table(warm, a.top))
                sys.stdout.flush()
    best = {k: min(r[k]["process_s"] for r in results) for k in ("cold", "warm")}
    if a.save:
        with open(a.save, "w") as f:
            json.dump(results, f, indent=1)
    for r in results:
        r.pop("records")
    if a.json:
        print(json.dumps({"runs": results, "min_process_s": best}))
    else:
        print(f"min over {a.repeat}: cold {best['cold']:.2f} s, warm {best['warm']:.2f} s "
              "(whole process, imports included)")


if __name__ == "__main__":
    main()
