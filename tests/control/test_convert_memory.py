"""``stimsteer convert`` streams the recording in windows (issue 17): the memory it needs beyond the session it
builds (and the HDF5 image of it, written whole for the full-disk reason of ``sysid/_files.py``) stays bounded,
whatever the recording's length. Measured with ``tracemalloc`` (NumPy reports its buffers to it), not by timing."""

import contextlib
import io
import tracemalloc

import numpy as np
import pytest

mne = pytest.importorskip("mne")
pytest.importorskip("edfio")

from stimsteer.control.cli import main  # noqa: E402

FS, SECONDS = 1000.0, 300


@pytest.fixture(scope="module")
def long_edf(tmp_path_factory):
    """A 5-minute EDF of 6 channels at 1 kHz written by MNE's own exporter (edfio); the description uses 4."""
    path = tmp_path_factory.mktemp("long") / "long.edf"
    rng = np.random.default_rng(0)
    data = rng.standard_normal((6, int(SECONDS * FS))) * 1e-4
    data[0] = 0.0
    data[0, ::250] = 1e-3  # stimulation pulses at 4 Hz
    names = ["STIM"] + [f"LFP{i}" for i in range(1, 6)]
    raw = mne.io.RawArray(data, mne.create_info(names, FS, ["misc"] + ["seeg"] * 5), verbose="error")
    mne.export.export_raw(path, raw, verbose="error")
    return path


@pytest.mark.slow
def test_convert_peaks_at_the_session_and_its_file_image_plus_bounded_windows(long_edf, tmp_path):
    # Before: the used channels were read whole (MNE's array), aligned into a list of full-length columns, stacked,
    # copied by nan_to_num and copied again by Session, then written: about 4.2x the session's float64 size at the
    # peak (measured 81 MB for a 19.2 MB session of 10 minutes; new code: 44 MB). Now the session's arrays are allocated once and filled
    # window by window (65,536 samples) from the file, and Session keeps them without a copy: the peak is the
    # session (1x), its in-memory HDF5 image (1x) and a few MB of windows, validity checks and MNE's own reading.
    desc = tmp_path / "d.toml"
    desc.write_text('[channels]\ninputs = ["STIM"]\noutputs = ["LFP1", "LFP2", "LFP3"]\n')
    out = tmp_path / "s.h5"
    session_bytes = SECONDS * FS * 4 * 8  # 4 float64 channels
    tracemalloc.start()
    try:
        with contextlib.redirect_stdout(io.StringIO()):
            assert main(["convert", str(long_edf), "--description", str(desc), "--out", str(out)]) == 0
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 2.0 * session_bytes + 12e6, f"peak {peak / 1e6:.1f} MB for a {session_bytes / 1e6:.1f} MB session"
