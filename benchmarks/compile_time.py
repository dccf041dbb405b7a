"""A new user's first fit: each demo field fitted with an empty compiled-code cache, then again with it filled.

    python benchmarks/compile_time.py                 # ashgrove brenmoor calloway, 1 round
    python benchmarks/compile_time.py --rounds 3      # the fastest of 3 rounds each (a shared machine is noisy)
    python benchmarks/compile_time.py --kernels       # also the compile seconds of each kernel (one cold fit)

Each fit is the default one (``tiltedring fit demo_fields/NAME_velocity.fits --intensity-map
demo_fields/NAME_intensity.fits --out D -q``, report included) in its own process, with
NUMBA_NUM_THREADS=1 and NUMBA_CACHE_DIR set to a fresh temporary folder (cold), then to the same
folder again (warm). Wall and CPU (user + system) seconds of the whole process come from
/usr/bin/time; CPU seconds vary less than wall seconds when others share the machine. Cold minus
warm is about the time numba spends compiling.
"""

import argparse
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
FIELDS = ("ashgrove", "brenmoor", "calloway")

KERNEL_TIMES = """
import collections, sys, time
from numba.core import event
seconds, started = collections.Counter(), {}
class Listener(event.Listener):
    def on_start(self, ev):
        started[id(ev.data['dispatcher']), str(ev.data['args'])] = time.process_time()
    def on_end(self, ev):
        d = ev.data['dispatcher']
        spent = time.process_time() - started.pop((id(d), str(ev.data['args'])))
        if d.py_func.__module__.startswith('tiltedring'):  # inclusive: a kernel's time holds its callees'
            seconds[d.py_func.__module__.split('.')[-1] + '.' + d.py_func.__name__] += spent
event.register('numba:compile', Listener())
from tiltedring.cli import main
try:
    main(sys.argv[1:])
except SystemExit:
    pass
for name, s in seconds.most_common():
    print(f'{s:.2f} {name}')
"""


def run(args, cache, extra_env=None):
    """(wall, cpu) seconds of one process with the numba cache in ``cache``; ``args`` follow ``python``."""
    env = dict(os.environ, NUMBA_CACHE_DIR=str(cache), NUMBA_NUM_THREADS="1", **(extra_env or {}))
    out = subprocess.run(["/usr/bin/time", "-f", "%e %U %S", sys.executable, *args], capture_output=True, text=True,
                         env=env, cwd=ROOT)
    if out.returncode != 0:
        raise RuntimeError(out.stderr[-2000:])
    wall, user, system = out.stderr.strip().splitlines()[-1].split()
    return float(wall), float(user) + float(system), out.stdout


def fit_args(name, out):
    fields = ROOT / "demo_fields"
    return ["-m", "tiltedring.cli", "fit", str(fields / f"{name}_velocity.fits"), "--intensity-map",
            str(fields / f"{name}_intensity.fits"), "--out", str(out), "-q"]


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("fields", nargs="*", default=FIELDS)
    parser.add_argument("--rounds", type=int, default=1)
    parser.add_argument("--kernels", action="store_true")
    args = parser.parse_args(argv)
    print("| field | cold wall s | cold cpu s | warm wall s | warm cpu s |")
    print("| --- | --- | --- | --- | --- |")
    for name in args.fields:
        cold, warm = [], []
        for r in range(args.rounds):
            with tempfile.TemporaryDirectory() as tmp:
                tmp = Path(tmp)
                cold.append(run(fit_args(name, tmp / "cold"), tmp / "cache")[:2])
                warm.append(run(fit_args(name, tmp / "warm"), tmp / "cache")[:2])
        (cw, cc), (ww, wc) = min(cold), min(warm)
        print(f"| {name} | {cw:.1f} | {cc:.1f} | {ww:.1f} | {wc:.1f} |", flush=True)
    if args.kernels:
        with tempfile.TemporaryDirectory() as tmp:
            tmp = Path(tmp)
            *_, text = run(["-c", KERNEL_TIMES, *fit_args(args.fields[0], tmp / "out")[2:]], tmp / "cache")
        print(f"\ncompile CPU seconds per kernel, {args.fields[0]} (inclusive of the kernels it calls)\n")
        print(text)


if __name__ == "__main__":
    main()
