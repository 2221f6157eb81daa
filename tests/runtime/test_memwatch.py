"""moerun.runtime.memwatch: peak resident-set growth since the watch started.

References: psutil's ``memory_info().rss`` and the kernel's ``VmHWM`` line of /proc/self/status (proc(5):
the peak resident set size, reset by writing 5 to /proc/self/clear_refs).  A buffer of known size, touched
page by page, must show up in the growth; one never touched must not (demand paging: untouched anonymous
pages are not resident, common practice, no source).
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np

from moerun.runtime.memwatch import MemWatch

MiB = 1 << 20


def test_a_touched_buffer_counts_in_the_peak_and_stays_counted_after_it_is_freed():
    # in a fresh process: in the test process, file-backed pages that earlier tests mapped (and whose pages
    # the cold-read tests drop) count in the resident set and can leave it meanwhile, hiding the growth
    src = (
        "import numpy as np\n"
        "from moerun.runtime.memwatch import MemWatch\n"
        "MiB = 1 << 20\n"
        "watch = MemWatch()\n"
        "a = np.ones(48 * MiB, np.uint8)\n"
        "grown = watch.peak_growth()\n"
        "del a\n"
        "print(grown, watch.peak_growth())\n"
    )
    out = subprocess.run([sys.executable, "-c", src], capture_output=True, text=True, check=True).stdout.split()
    grown, after = int(out[0]), int(out[1])
    assert grown >= 44 * MiB, grown  # every page written
    assert after >= grown  # a peak, not the current size


def test_an_untouched_allocation_does_not_count():
    watch = MemWatch()
    b = np.empty(256 * MiB, np.uint8)  # reserved, never written: no page is resident
    assert watch.peak_growth() < 32 * MiB
    del b
