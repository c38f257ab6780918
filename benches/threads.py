#!/usr/bin/env python3
"""CPU time and run-queue wait by thread of one `slopewarden ingest`.

Reads /proc/<pid>/task/<tid>/schedstat every 50 ms while the ingest runs
and keeps each thread's last reading (a thread's figures vanish when it
exits, so the last 50 ms of each are missed; short-lived threads, such as
the second robust-slope thread of a file, are summed by name). Cheap enough
not to disturb the run, unlike perf's scheduler tracing.

Usage: python3 benches/threads.py CONFIG INBOX [BINARY]
  CONFIG  a configuration whose database is removed first (a fresh store)
  INBOX   the files or folder to ingest
  BINARY  default target/release/slopewarden

Linux only (/proc). Prints the wall time and, per thread name, how many
threads had it, their CPU seconds and their seconds waiting on the run queue.
"""

import glob
import os
import subprocess
import sys
import time


def main():
    if len(sys.argv) < 3:
        sys.exit(__doc__)
    config, inbox = sys.argv[1], sys.argv[2]
    binary = sys.argv[3] if len(sys.argv) > 3 else "target/release/slopewarden"
    database = None
    with open(config, encoding="utf-8") as fh:
        for line in fh:
            if line.strip().startswith("database"):
                database = line.split("=", 1)[1].strip().strip('"')
    if database is None:
        sys.exit(f"{config}: no `database` key in [paths]")
    if not os.path.isabs(database):
        database = os.path.join(os.path.dirname(os.path.abspath(config)), database)
    for f in glob.glob(database + "*"):
        os.remove(f)
    start = time.time()
    proc = subprocess.Popen(
        [binary, "ingest", "--config", config, inbox],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    last = {}
    while proc.poll() is None:
        for task in glob.glob(f"/proc/{proc.pid}/task/*"):
            try:
                with open(task + "/comm", encoding="utf-8") as fh:
                    name = fh.read().strip()
                with open(task + "/schedstat", encoding="utf-8") as fh:
                    on_cpu, run_queue, _ = fh.read().split()
            except (OSError, ValueError):
                continue  # the thread exited between listing and reading
            last[(task, name)] = (int(on_cpu) / 1e9, int(run_queue) / 1e9)
        time.sleep(0.05)
    wall = time.time() - start
    if proc.returncode != 0:
        sys.exit(f"ingest exited with {proc.returncode}")
    by_name = {}
    for (_, name), (on_cpu, run_queue) in last.items():
        total = by_name.setdefault(name, [0, 0.0, 0.0])
        total[0] += 1
        total[1] += on_cpu
        total[2] += run_queue
    print(f"wall {wall:.2f} s, CPU {sum(t[1] for t in by_name.values()):.2f} s")
    for name, (count, on_cpu, run_queue) in sorted(by_name.items(), key=lambda kv: -kv[1][1]):
        print(f"  {name:16s} x{count:<4d} CPU {on_cpu:6.2f} s  run queue {run_queue:5.2f} s")


if __name__ == "__main__":
    main()
