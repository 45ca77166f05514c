"""Run the compiled NNLS kernel on the half-constrained benchmark image, for ``perf`` to profile.

perf cannot name functions compiled at run time; this script writes ``/tmp/perf-<pid>.map`` (the
format perf reads for such code) with the address of every function numba compiled for
``probeplan.unmixing.nnls``, so that ``perf report`` shows ``_accumulate``, ``_drop_one``,
``_table_batch``... instead of bare addresses.  Needs ``perf`` and ``nm`` (binutils).

    perf record -F 4000 -D 20000 -o /tmp/nnls.perf python3 tools/profile_nnls.py 20
    perf report -i /tmp/nnls.perf --no-children --sort symbol

(``-D`` skips the set-up; the argument is how many seconds to loop.)  One thread, so that the
profile is the kernel's and not the thread pool's: ``NUMBA_NUM_THREADS=1``.
"""

import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

# an empty cache folder: the kernels compile here, so their LLVM modules are at hand for the map
os.environ["NUMBA_CACHE_DIR"] = tempfile.mkdtemp(prefix="probeplan-numba-")
os.environ.setdefault("NUMBA_NUM_THREADS", "1")

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests" / "benchmarks"))
from test_bench_unmix import _hard_stack, _realistic_stack  # noqa: E402

from probeplan.unmixing import nnls  # noqa: E402


def write_perf_map(module) -> Path:
    """Write /tmp/perf-<pid>.map for every compiled function of ``module``; return its path."""
    lines = []
    with tempfile.TemporaryDirectory() as tmp:
        obj_path = Path(tmp) / "kernel.o"
        for name in dir(module):
            dispatcher = getattr(module, name)
            for cres in getattr(dispatcher, "overloads", {}).values():
                library = cres.library
                obj_path.write_bytes(library._codegen._tm.emit_object(library._final_module))
                listing = subprocess.run(["nm", "-S", "--defined-only", str(obj_path)], capture_output=True,
                                         text=True, check=True).stdout
                symbols = {}
                for line in listing.splitlines():
                    parts = line.split()
                    if len(parts) == 4 and parts[2] in "tT":
                        symbols[parts[3]] = (int(parts[0], 16), int(parts[1], 16))
                entry = cres.fndesc.llvm_func_name
                base = library.get_pointer_to_function(entry) - symbols[entry][0]
                for symbol, (offset, size) in symbols.items():
                    short = name if symbol == entry else f"{name}>{symbol[:50]}"
                    lines.append(f"{base + offset:x} {size:x} {short}")
    path = Path(f"/tmp/perf-{os.getpid()}.map")
    path.write_text("\n".join(lines) + "\n")
    return path


def main(seconds: float) -> None:
    rng = np.random.default_rng(0)
    M, easy = _realistic_stack(8, 4, 2048, 2048, rng)
    Y = _hard_stack(easy, M, rng).reshape(8, -1)
    nnls.nnls_pixels(M, Y)  # compile
    print(f"perf map: {write_perf_map(nnls)}", file=sys.stderr)
    t = time.perf_counter()
    calls = 0
    while time.perf_counter() - t < seconds:
        nnls.nnls_pixels(M, Y)
        calls += 1
    print(f"{calls} calls, {(time.perf_counter() - t) / calls * 1e3:.1f} ms each", file=sys.stderr)


if __name__ == "__main__":
    main(float(sys.argv[1]) if len(sys.argv) > 1 else 20.0)
