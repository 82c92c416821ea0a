"""How much memory the process may allocate."""
import gc
import os
import warnings

from unitlens._memory import available_memory


def test_available_memory_closes_its_files_and_stays_below_physical_memory():
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        free = available_memory()
        gc.collect()  # an unclosed file warns when it is collected
    assert not [w for w in seen if issubclass(w.category, ResourceWarning)]
    physical = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")  # POSIX: the machine's memory
    assert 256 << 20 <= free <= physical
