"""The allocator settings the service applies (streamguard/memory.py) take effect on this platform."""

from __future__ import annotations

import sys

import numpy as np
import pytest

from streamguard import memory


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc only")
def test_threshold_is_set_and_freed_pages_go_back() -> None:
    """On glibc (the container's and this machine's C library) mallopt accepts the threshold and a trim
    after freeing a large heap churn reports pages handed back."""
    assert memory.fix_mmap_threshold()
    blocks = [np.ones(20_000) for _ in range(2000)]  # 160 kB each: under the threshold, so on the heap
    del blocks[:-1]  # freed in the middle of the heap, behind the last one
    assert memory.release_free_memory()


def test_the_live_service_does_not_load_pyarrow_or_matplotlib() -> None:
    """pyarrow costs a service ~67 MB resident (measured, DEVELOPERS.md); the decoder keeps it to a rare path."""
    import subprocess

    code = ("import sys, streamguard.service, streamguard.service_commands, streamguard.cli; "
            "print(sorted(m for m in ('pyarrow', 'matplotlib', 'pandas') if m in sys.modules))")  # fmt: skip
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"
