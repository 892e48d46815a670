"""Peak resident memory of one call, for the benchmark scripts' fresh-subprocess cases.

On Linux the kernel's high-water mark is reset first (/proc/self/clear_refs),
so the peak belongs to the measured call alone; elsewhere ru_maxrss (the peak
of the whole process) is the fallback, which overstates nothing measured
after the process's own set-up but includes it.
"""

from __future__ import annotations

import resource
import time


def status_kb(field):
    """A field of /proc/self/status in kB (None when absent)."""
    for line in open("/proc/self/status"):
        if line.startswith(field + ":"):
            return int(line.split()[1])
    return None


def measure_call(fn):
    """Run fn() once; returns dict(before_kb, peak_kb, extra_kb, seconds, how)."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
        how = "clear_refs+VmHWM"
    except OSError:
        how = "ru_maxrss"
    before = status_kb("VmRSS")
    t0 = time.perf_counter()
    fn()
    seconds = time.perf_counter() - t0
    peak = status_kb("VmHWM") if how == "clear_refs+VmHWM" else resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return dict(before_kb=before, peak_kb=peak, extra_kb=peak - before, seconds=seconds, how=how)
