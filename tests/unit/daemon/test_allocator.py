"""The C allocator's thresholds (shoal.daemon.runtime.allocator): frame-sized buffers come from
malloc's arenas (reused from frame to frame), not from a fresh ``mmap`` each."""
import os
import subprocess
import sys

import pytest

from shoal.daemon.runtime.allocator import tune_allocator

# In a fresh interpreter: bytes glibc holds in separate mmaps (mallinfo2's hblkhd) while
# a frame's 8 MiB feature matrix (65,536 rows x 16 features) is alive.
_FRAME = r"""
import ctypes, sys
import numpy as np
from shoal.daemon.runtime.allocator import tune_allocator

class Info(ctypes.Structure):
    _fields_ = [(n, ctypes.c_size_t) for n in ("arena", "ordblks", "smblks", "hblks",
                "hblkhd", "usmblks", "fsmblks", "uordblks", "fordblks", "keepcost")]
try:
    mallinfo2 = ctypes.CDLL(None).mallinfo2
except AttributeError:
    print("no-mallinfo2 0"); sys.exit()
mallinfo2.restype = Info
tuned = tune_allocator({}) if sys.argv[1] == "tuned" else False
before = mallinfo2().hblkhd
frame = np.empty((65536, 16)); frame.fill(1.0)
print(tuned, mallinfo2().hblkhd - before)
"""


def _mapped(mode: str) -> tuple[str, int]:
    out = subprocess.run([sys.executable, "-c", _FRAME, mode], capture_output=True,
                         text=True, check=True)
    tuned, mapped = out.stdout.split()
    return tuned, int(mapped)


def test_a_frame_buffer_is_served_from_the_arena_once_tuned():
    tuned, mapped = _mapped("tuned")
    if tuned != "True":
        pytest.skip("not glibc 2.33+: the allocator's thresholds cannot be set or seen")
    default, mapped_default = _mapped("default")
    frame = 65536 * 16 * 8
    # glibc's default (a block this big gets its own mmap, unmapped when freed): the
    # reference that the check below can tell the two apart
    assert mapped_default >= frame
    assert mapped < frame


def test_an_operators_malloc_tunables_are_left_alone(monkeypatch):
    assert tune_allocator({"GLIBC_TUNABLES": "glibc.malloc.trim_threshold=0"}) is False
    monkeypatch.setattr(sys, "platform", "darwin")
    assert tune_allocator({}) is False


# Arrow's pool: buffers made and freed again and again with pauses longer than mimalloc's
# default purge delay (10 ms), as frames are; prints the page faults taken meanwhile.
_ARROW_FRAMES = r"""
import resource, sys, time
import shoal.daemon.cli.main  # noqa: F401  (sets the allocator's environment)
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
source = pa.array(np.ones(1 << 17))
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(30):
    made = [pc.add(source, 1.0) for _ in range(16)]   # 1 MiB each, from Arrow's pool
    del made
    time.sleep(0.03)
print(pa.default_memory_pool().backend_name,
      resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
"""


def _arrow_faults(**env) -> tuple[str, int]:
    environ = {k: v for k, v in os.environ.items() if k != "MIMALLOC_PURGE_DELAY"}
    out = subprocess.run([sys.executable, "-c", _ARROW_FRAMES], capture_output=True,
                         text=True, check=True, env=dict(environ, **env))
    pool, faults = out.stdout.split()
    return pool, int(faults)


def test_arrow_memory_freed_between_frames_is_reused_not_handed_back():
    pool, kept = _arrow_faults()
    if pool != "mimalloc":
        pytest.skip(f"Arrow's pool here is {pool}, not mimalloc")
    # an operator's own setting wins over the command line's; 0 hands memory back at once
    _, handed_back = _arrow_faults(MIMALLOC_PURGE_DELAY="0")
    # measured: ~40 faults kept against ~250 with mimalloc's default (10 ms)
    assert kept * 3 < handed_back, (kept, handed_back)


def test_the_command_line_moves_start_up_objects_out_of_the_collectors_view():
    """After ``main`` starts, the objects of the imports are frozen (gc.freeze), so a full
    collection during an input does not walk them."""
    script = ("import gc, sys\n"
              "from shoal.daemon.cli.main import main\n"
              "before = gc.get_freeze_count()\n"
              "main(['config', '-c', sys.argv[1]])   # a configuration error\n"
              "print(before, gc.get_freeze_count(), len(gc.get_objects(generation=2)))\n")
    out = subprocess.run([sys.executable, "-c", script, "/nonexistent/shoal.yaml"],
                         capture_output=True, text=True, check=True)
    before, frozen, oldest = map(int, out.stdout.split())
    assert before == 0 and frozen > 10_000 and oldest < frozen // 10
