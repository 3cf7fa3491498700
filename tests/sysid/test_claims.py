"""Outputs are claimed before computing: one run per output, leftovers of a killed run cleaned, plain OS errors."""

import errno
import multiprocessing as mp
import subprocess
import sys
import time

import pytest

from stimsteer.sysid._claims import claim_output, os_error_text
from stimsteer.sysid.exceptions import OutputError, StimsteerError


def test_a_second_claim_on_the_same_output_fails_at_once(tmp_path):
    out = tmp_path / "plan"
    with claim_output(out):
        with pytest.raises(OutputError, match="being written by another run"):
            with claim_output(out):
                pass
    assert not (tmp_path / ".plan.claim").exists()  # released
    with claim_output(out):  # and free again
        pass


def test_an_existing_output_is_refused_before_computing_unless_forced(tmp_path):
    out = tmp_path / "model.h5"
    out.write_text("kept")
    with pytest.raises(OutputError, match="already exists.*--force"):
        with claim_output(out):
            pytest.fail("the body must not run")
    with claim_output(out, force=True):
        pass
    assert out.read_text() == "kept"
    assert issubclass(OutputError, StimsteerError)


def test_the_claim_is_released_when_the_run_fails(tmp_path):
    out = tmp_path / "report"
    with pytest.raises(RuntimeError):
        with claim_output(out):
            raise RuntimeError("the computation failed")
    assert not list(tmp_path.iterdir())


def _dead_pid():
    proc = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    return int(proc.stdout)


def test_a_dead_runs_claim_and_temporary_files_are_removed_and_named(tmp_path):
    out = tmp_path / "report"
    (tmp_path / ".report.claim").write_text(f"{_dead_pid()} 1")
    (tmp_path / ".report.abc123").mkdir()
    (tmp_path / ".report.abc123" / "half.csv").write_text("1,2")
    notes = []
    with claim_output(out, notes=notes):
        pass
    assert [p.name for p in tmp_path.iterdir()] == []
    assert len(notes) == 1 and ".report.abc123" in notes[0]


def _race(path, barrier, results):
    barrier.wait()
    try:
        with claim_output(path):
            time.sleep(0.5)  # hold the claim while the others try
        results.put("won")
    except OutputError:
        results.put("refused")


def test_of_three_concurrent_runs_exactly_one_claims_the_output(tmp_path):
    ctx = mp.get_context("spawn")
    barrier, results = ctx.Barrier(3), ctx.Queue()
    procs = [ctx.Process(target=_race, args=(tmp_path / "out", barrier, results)) for _ in range(3)]
    for p in procs:
        p.start()
    outcome = sorted(results.get(timeout=60) for _ in procs)
    for p in procs:
        p.join(timeout=60)
    assert outcome == ["refused", "refused", "won"]


@pytest.mark.parametrize("code, words", [(errno.ENOSPC, "No space left on device"),
                                         (errno.EROFS, "Read-only file system"),
                                         (errno.EMFILE, "Too many open files")])
def test_os_errors_read_as_one_line_naming_the_path_and_the_reason(code, words):
    # the reasons are the C library's strerror texts (POSIX; common practice, no source)
    text = os_error_text(OSError(code, "x", "/data/out.h5"))
    assert "/data/out.h5" in text and words in text and "\n" not in text


def test_an_hdf5_write_error_names_the_system_reason():
    exc = OSError("Can't write data (file write failed: time = Tue, errno = 28, error message = 'No space')")
    assert "No space left on device (ENOSPC)" in os_error_text(exc, "m.h5")
