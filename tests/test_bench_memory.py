"""The memory benchmark's own parts: the dev sets it writes and the VmHWM it reads (no timing)."""

import sys

from benchmarks.bench_memory import SAMPLE_DEVSET, measure, vmhwm_mb, write_devset
from triage.data.devset import read_devset


def test_generated_devsets_have_the_rows_asked_for_with_unique_ids_and_sources(tmp_path):
    sample = read_devset(str(SAMPLE_DEVSET)).frame
    for rows in (7, len(sample) + 5):
        path = tmp_path / f"dev{rows}.tsv"
        write_devset(path, rows)
        frame = read_devset(str(path)).frame
        assert len(frame) == rows
        assert frame["id"].is_unique and frame["source"].is_unique
        # references and outputs are the sample's, so the share of failed rows carries over
        for i in (0, rows - 1):
            j = i % len(sample)
            assert frame["references"].iat[i] == sample["references"].iat[j]
            assert frame["output"].iat[i] == sample["output"].iat[j]
            assert frame["source"].iat[i].startswith(sample["source"].iat[j])


def test_vmhwm_is_read_from_a_status_text():
    text = "Name:\tpython\nVmPeak:\t  900000 kB\nVmHWM:\t  524288 kB\nVmRSS:\t  100000 kB\n"
    assert vmhwm_mb(text) == 512.0
    assert vmhwm_mb("Name:\tzombie\nState:\tZ (zombie)\n") is None


def test_measure_sees_a_child_that_holds_memory(tmp_path):
    hold = "import time; b = bytearray(200 * 2**20); b[::4096] = b'x' * len(b[::4096]); time.sleep(0.3)"
    m = measure([sys.executable, "-c", hold], tmp_path / "log")
    assert m["peak_mb"] >= 200 and m["ru_maxrss_mb"] >= 200
