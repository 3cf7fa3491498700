"""The recorded stimulation session: inputs, outputs, trials, names, units, a validity mask and an output mask.

A :class:`Session` is the one container every other part of stimsteer reads. It is a frozen dataclass whose arrays
are read-only copies, validated once at construction; every method that changes something returns a new session.
"""

from __future__ import annotations

import dataclasses
import hashlib
from dataclasses import dataclass, field
from typing import Iterator, Mapping, Sequence

import numpy as np

from .exceptions import SessionError

__all__ = ["Session", "TrialWindow", "TrialSplit"]


@dataclass(frozen=True)
class TrialWindow:
    """One trial's samples, as yielded by :meth:`Session.iter_trials`.

    Attributes
    ----------
    index : int
        Position of the trial in the session's trial list.
    start, stop : int
        Half-open sample range ``[start, stop)`` in the session's sample grid.
    u : ndarray, shape (n_samples, n_inputs)
    y : ndarray, shape (n_samples, n_outputs)
    mask : ndarray of bool, shape (n_samples,)
        True where the sample is valid.
    """

    index: int
    start: int
    stop: int
    u: np.ndarray
    y: np.ndarray
    mask: np.ndarray


@dataclass(frozen=True)
class TrialSplit:
    """A seeded split of a session's trials into training and held-out trials (indices into the original list)."""

    train: tuple[int, ...]
    test: tuple[int, ...]
    seed: int

    def as_dict(self) -> dict:
        return {"train": list(self.train), "test": list(self.test), "seed": int(self.seed)}


def _readonly(a: np.ndarray) -> np.ndarray:
    if not a.flags.writeable and a.flags.owndata:
        return a  # already frozen by its maker (another session, or a reader that fills its arrays in place): shared
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


def _as_2d_float(name: str, a) -> np.ndarray:
    arr = np.asarray(a, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2:
        raise SessionError(
            f"{name} must be a 2-D time-major array (n_samples, n_channels); got {arr.ndim} dimensions "
            f"with shape {arr.shape}. Reshape it so that rows are samples."
        )
    return arr


def _names(kind: str, names, n: int, prefix: str) -> tuple[str, ...]:
    if names is None:
        return tuple(f"{prefix}{i}" for i in range(n))
    names = tuple(str(s) for s in names)
    if len(names) != n:
        raise SessionError(f"{kind} must have one entry per channel; got {len(names)} for {n} channels.")
    if any(not s.strip() for s in names):
        raise SessionError(f"{kind} must not contain empty strings; got {list(names)}.")
    return names


def check_read_buffers(out, n: int, m: int, p: int) -> tuple[np.ndarray, np.ndarray]:
    """The ``(u_out, y_out)`` buffers of a ``read(..., out=...)``, checked against the window's shapes (shared by
    :class:`Session` and the lazily opened session file)."""
    try:
        u, y = out
    except (TypeError, ValueError):
        raise SessionError("out must be a pair (u_out, y_out) of float64 arrays.") from None
    for name, a, shape in (("u_out", u, (n, m)), ("y_out", y, (n, p))):
        if not isinstance(a, np.ndarray) or a.dtype != np.float64 or a.shape != shape or not a.flags.writeable:
            raise SessionError(f"{name} must be a writeable float64 array of shape {shape}; got "
                               f"{getattr(a, 'dtype', type(a).__name__)} {getattr(a, 'shape', '')}.")
    return u, y


class TrialLayout:
    """Trial counts and durations of anything with ``trials``, ``n_samples`` and ``sample_rate_hz``
    (a :class:`Session`, a lazily opened session file and a stimulation schedule alike)."""

    @property
    def n_trials(self) -> int:
        return int(self.trials.shape[0])

    @property
    def trial_lengths(self) -> np.ndarray:
        """Samples per trial, shape (n_trials,)."""
        return self.trials[:, 1] - self.trials[:, 0]

    @property
    def duration_s(self) -> float:
        return self.n_samples / self.sample_rate_hz


@dataclass(frozen=True, eq=False)
class Session(TrialLayout):
    """A recorded stimulation session.

    Parameters
    ----------
    u : array_like, shape (n_samples, n_inputs)
        Stimulation inputs, one column per stimulation site (e.g. amplitude in µA).
    y : array_like, shape (n_samples, n_outputs)
        Recorded outputs, one column per recorded channel.
    sample_rate_hz : float
        Sampling rate of both ``u`` and ``y``, in Hz; must be positive and finite.
    trials : sequence of (int, int), optional
        Half-open sample ranges ``[start, stop)``, sorted, non-overlapping, non-empty and inside the recording.
        Default: one trial spanning the whole recording.
    input_names, output_names : sequence of str, optional
        Unique channel names. Default ``u0, u1, ...`` and ``y0, y1, ...``.
    input_units, output_units : sequence of str, optional
        Unit of each channel (e.g. ``"uA"``, ``"mV"``). Default ``"a.u."`` (arbitrary units).
    mask : array_like of bool, shape (n_samples,), optional
        True where a sample is valid; False marks missing samples and blanked artifacts. Default all True.
        Values at masked samples are ignored (they may be NaN).
    output_mask : array_like of bool, shape (n_samples,), optional
        True where the recorded outputs may be scored and fitted as targets; False marks outputs hidden by a
        stimulation artifact (:func:`stimsteer.sysid.artifacts.blank_artifacts`). Unlike ``mask`` it leaves the
        inputs of those samples valid: a regression row or Hankel column whose *predicted* outputs are blanked
        does not enter a fit, and blanked outputs are not scored, but rows that only see the inputs (or past
        outputs) of a blanked sample are kept. Outputs there must be finite (blanking fills them by a straight line
        across the window). Default all True.
    metadata : mapping, optional
        Free JSON-like metadata (strings, numbers, lists, dicts).

    Raises
    ------
    SessionError
        On any inconsistency; the message names the field and the fix.

    Examples
    --------
    >>> import numpy as np
    >>> s = Session(u=np.zeros((100, 1)), y=np.ones((100, 2)), sample_rate_hz=1000.0, trials=[(0, 50), (50, 100)])
    >>> s.n_trials, s.duration_s
    (2, 0.1)
    """

    u: np.ndarray
    y: np.ndarray
    sample_rate_hz: float
    trials: np.ndarray = None
    input_names: tuple = None
    output_names: tuple = None
    input_units: tuple = None
    output_units: tuple = None
    mask: np.ndarray = None
    metadata: Mapping = field(default_factory=dict)
    output_mask: np.ndarray = None

    def __post_init__(self):
        u = _as_2d_float("u (inputs)", self.u)
        y = _as_2d_float("y (outputs)", self.y)
        if u.shape[0] != y.shape[0]:
            raise SessionError(
                f"inputs and outputs must have the same number of samples; got {u.shape[0]} and {y.shape[0]}. "
                "Trim or resample them to a common grid."
            )
        n = u.shape[0]
        if n == 0:
            raise SessionError("the session holds no samples; give at least one sample of inputs and outputs.")
        rate = self._check_rate(self.sample_rate_hz)
        mask = self._check_mask(self.mask, n)
        output_mask = self._check_mask(self.output_mask, n, "output_mask")
        trials = self._check_trials(self.trials, n)
        names = {
            "input_names": _names("input_names", self.input_names, u.shape[1], "u"),
            "output_names": _names("output_names", self.output_names, y.shape[1], "y"),
        }
        self._check_finite(u, y, mask, names, rate)
        all_names = names["input_names"] + names["output_names"]
        dupes = sorted({s for s in all_names if all_names.count(s) > 1})
        if dupes:
            raise SessionError(
                f"channel names must be unique across inputs and outputs; duplicated: {dupes}. Rename them."
            )
        units = {
            "input_units": self._check_units("input_units", self.input_units, u.shape[1]),
            "output_units": self._check_units("output_units", self.output_units, y.shape[1]),
        }
        set_ = object.__setattr__
        set_(self, "u", _readonly(u))
        set_(self, "y", _readonly(y))
        set_(self, "sample_rate_hz", rate)
        set_(self, "mask", _readonly(mask))
        set_(self, "output_mask", _readonly(output_mask))
        set_(self, "trials", _readonly(trials))
        for k, v in {**names, **units}.items():
            set_(self, k, v)
        set_(self, "metadata", dict(self.metadata or {}))

    # ----------------------------------------------------------------------------------------------- validation
    @staticmethod
    def _check_rate(rate) -> float:
        try:
            rate = float(rate)
        except (TypeError, ValueError):
            raise SessionError(f"sample_rate_hz must be a number in Hz; got {rate!r}.") from None
        if not np.isfinite(rate) or rate <= 0:
            raise SessionError(f"sample_rate_hz must be positive and finite; got {rate}. Give the rate in Hz.")
        return rate

    @staticmethod
    def _check_mask(mask, n: int, name: str = "mask") -> np.ndarray:
        if mask is None:
            return np.ones(n, dtype=bool)
        m = np.asarray(mask)
        if m.dtype != bool:
            if not np.isin(m, (0, 1)).all():
                raise SessionError(f"{name} must be boolean (True = valid sample); got values other than 0/1.")
            m = m.astype(bool)
        m = m.reshape(-1) if m.ndim == 2 and 1 in m.shape else m
        if m.shape != (n,):
            raise SessionError(f"{name} must have shape ({n},), one flag per sample; got {m.shape}.")
        return m

    @staticmethod
    def _check_trials(trials, n: int) -> np.ndarray:
        if trials is None:
            return np.array([[0, n]], dtype=np.int64)
        t = np.asarray(trials)
        if t.size == 0:
            raise SessionError("trials is empty; give at least one [start, stop) range, or omit it for one trial.")
        if t.ndim != 2 or t.shape[1] != 2:
            raise SessionError(f"trials must be a list of [start, stop) pairs; got an array of shape {t.shape}.")
        if not np.all(np.asarray(t, dtype=np.float64) == np.round(np.asarray(t, dtype=np.float64))):
            raise SessionError("trial bounds must be whole sample indices; got fractional values.")
        t = t.astype(np.int64)
        for i, (a, b) in enumerate(t):
            if b <= a:
                raise SessionError(f"trial {i} is empty or reversed: [{a}, {b}). Each trial needs start < stop.")
            if a < 0 or b > n:
                raise SessionError(
                    f"trial {i} [{a}, {b}) lies outside the recording of {n} samples; bounds must be in [0, {n}]."
                )
        if np.any(np.diff(t[:, 0]) < 0):
            raise SessionError("trials must be sorted by start sample; sort them before building the session.")
        overlap = np.nonzero(t[1:, 0] < t[:-1, 1])[0]
        if overlap.size:
            i = int(overlap[0])
            raise SessionError(
                f"trials {i} [{t[i, 0]}, {t[i, 1]}) and {i + 1} [{t[i + 1, 0]}, {t[i + 1, 1]}) overlap; "
                "trials must not share samples."
            )
        return t

    @staticmethod
    def _check_finite(u: np.ndarray, y: np.ndarray, mask: np.ndarray, names: dict, rate: float) -> None:
        for kind, a, chans in (("input", u, names["input_names"]), ("output", y, names["output_names"])):
            step = 1 << 16  # checked in windows: the temporary flags of a long session stay small
            if not any((~np.isfinite(a[i:i + step]) & mask[i:i + step, None]).any() for i in range(0, len(a), step)):
                continue
            bad = ~np.isfinite(a) & mask[:, None]
            if bad.any():
                rows, cols = np.nonzero(bad)
                per = np.bincount(cols, minlength=a.shape[1])
                which = ", ".join(f"{chans[j]} ({per[j]})" for j in np.flatnonzero(per))
                raise SessionError(
                    f"{bad.sum()} NaN or infinite {kind} value(s) at valid samples, in {which}; the first in "
                    f"{kind} {chans[cols[0]]!r} at t = {rows[0] / rate:.6g} s (sample {rows[0]}). Mark those samples "
                    "invalid (mask=False; in a table, valid = 0, or leave the cell empty: an empty cell is read as a "
                    "masked sample) or repair the values."
                )

    @staticmethod
    def _check_units(kind: str, units, n: int) -> tuple[str, ...]:
        if units is None:
            return tuple("a.u." for _ in range(n))
        units = tuple(str(s) for s in units)
        if len(units) != n:
            raise SessionError(f"{kind} must have one unit per channel; got {len(units)} for {n} channels.")
        if any(not s.strip() for s in units):
            raise SessionError(f"{kind} must not contain empty strings; use 'a.u.' for arbitrary units.")
        return units

    # ----------------------------------------------------------------------------------------------- properties
    @property
    def n_samples(self) -> int:
        return int(self.u.shape[0])

    @property
    def n_inputs(self) -> int:
        return int(self.u.shape[1])

    @property
    def n_outputs(self) -> int:
        return int(self.y.shape[1])

    @property
    def masked_fraction(self) -> float:
        """Fraction of in-trial samples that are masked (invalid)."""
        inside = self._in_trial()
        return float((~self.mask & inside).sum() / max(inside.sum(), 1))

    @property
    def blanked_output_fraction(self) -> float:
        """Fraction of valid in-trial samples whose outputs are blanked (``output_mask`` False)."""
        valid = self._in_trial() & self.mask
        return float((valid & ~self.output_mask).sum() / max(valid.sum(), 1))

    def _in_trial(self) -> np.ndarray:
        inside = np.zeros(self.n_samples, dtype=bool)
        for a, b in self.trials:
            inside[a:b] = True
        return inside

    # ----------------------------------------------------------------------------------------------- selection
    def iter_trials(self) -> Iterator[TrialWindow]:
        """Yield each trial as a :class:`TrialWindow` (views, read-only)."""
        for i, (a, b) in enumerate(self.trials):
            yield TrialWindow(int(i), int(a), int(b), self.u[a:b], self.y[a:b], self.mask[a:b])

    def segments(self, min_length: int = 1) -> list[tuple[int, int]]:
        """Maximal runs of valid samples inside trials, as half-open ranges ``[start, stop)``.

        No segment crosses a trial boundary or contains a masked sample; segments shorter than ``min_length``
        are dropped. Regression rows and Hankel columns are built inside these runs only.
        """
        out = []
        for a, b in self.trials:
            m = np.concatenate(([False], self.mask[a:b], [False]))
            edges = np.flatnonzero(np.diff(m.astype(np.int8)))
            for s, e in zip(edges[::2], edges[1::2]):
                if e - s >= min_length:
                    out.append((int(a + s), int(a + e)))
        return out

    def read(self, start: int, stop: int, *, out=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Samples ``[start, stop)`` as ``(u, y, mask)``; the same call exists on a lazily opened session file.

        Without ``out`` the arrays are read-only views. ``out = (u_out, y_out)`` copies the window into those
        float64 arrays (shapes ``(stop - start, n_inputs)`` and ``(stop - start, n_outputs)``) and returns them.
        """
        start, stop = int(start), int(stop)
        if not 0 <= start <= stop <= self.n_samples:
            raise SessionError(f"window [{start}, {stop}) is outside the recording of {self.n_samples} samples.")
        if out is None:
            return self.u[start:stop], self.y[start:stop], self.mask[start:stop]
        u, y = check_read_buffers(out, stop - start, self.n_inputs, self.n_outputs)
        np.copyto(u, self.u[start:stop])
        np.copyto(y, self.y[start:stop])
        return u, y, self.mask[start:stop]

    def select_trials(self, indices: Sequence[int]) -> "Session":
        """A new session holding only the given trials (in the given order), concatenated and re-indexed.

        The metadata records the original trial indices under ``"source_trials"``; condition labels
        (``"trial_conditions"``, one per trial) follow their trials.
        """
        idx = [int(i) for i in np.atleast_1d(np.asarray(indices, dtype=np.int64))]
        if not idx:
            raise SessionError("select_trials needs at least one trial index; got none.")
        bad = [i for i in idx if i < 0 or i >= self.n_trials]
        if bad:
            raise SessionError(f"trial indices {bad} are out of range; this session has {self.n_trials} trials.")
        if len(set(idx)) != len(idx):
            raise SessionError(f"trial indices must be unique; got {idx}.")
        parts = [self.trials[i] for i in idx]
        u = np.concatenate([self.u[a:b] for a, b in parts])
        y = np.concatenate([self.y[a:b] for a, b in parts])
        mask = np.concatenate([self.mask[a:b] for a, b in parts])
        output_mask = np.concatenate([self.output_mask[a:b] for a, b in parts])
        stops = np.cumsum([b - a for a, b in parts])
        trials = np.column_stack([np.concatenate(([0], stops[:-1])), stops])
        src = self.metadata.get("source_trials")
        origin = [int(src[i]) for i in idx] if src is not None and len(src) == self.n_trials else idx
        metadata = {**self.metadata, "source_trials": origin}
        labels = self.metadata.get("trial_conditions")  # one condition label per trial: kept with its trial
        if labels is not None and len(labels) == self.n_trials:
            metadata["trial_conditions"] = [labels[i] for i in idx]
        return dataclasses.replace(self, u=u, y=y, mask=mask, output_mask=output_mask, trials=trials, metadata=metadata)

    def select(self, *, inputs=None, outputs=None, drop=None) -> "Session":
        """A new session with only some channels, chosen by name or glob pattern (``"lfp_*"``, ``"site_?"``).

        Parameters
        ----------
        inputs, outputs : str or sequence of str, optional
            Channels to keep (a string may list several, comma-separated); default all.
        drop : str or sequence of str, optional
            Channels to leave out, inputs or outputs (e.g. a dead channel).

        Raises
        ------
        SessionError
            A name or pattern matches no channel (the message lists the known ones), or no output is left.

        Examples
        --------
        >>> import numpy as np
        >>> s = Session(u=np.zeros((4, 2)), y=np.ones((4, 3)), sample_rate_hz=100.0, input_names=["a", "b"],
        ...             output_names=["lfp_1", "lfp_2", "emg"])
        >>> s.select(outputs="lfp_*", drop="lfp_2").output_names
        ('lfp_1',)
        """
        from .channel_select import selected_indices

        ins, outs = selected_indices(self.input_names, self.output_names, inputs=inputs, outputs=outputs, drop=drop)
        kept = {"inputs": [self.input_names[i] for i in ins], "outputs": [self.output_names[j] for j in outs]}
        return dataclasses.replace(
            self, u=self.u[:, ins], y=self.y[:, outs], input_names=tuple(kept["inputs"]),
            output_names=tuple(kept["outputs"]), input_units=tuple(self.input_units[i] for i in ins),
            output_units=tuple(self.output_units[j] for j in outs),
            metadata={**self.metadata, "selected_channels": kept})

    def split(self, n_test: int | None = None, *, test_fraction: float = 0.25, seed: int = 0) -> TrialSplit:
        """Split whole trials into training and held-out sets, at random with ``seed``.

        Parameters
        ----------
        n_test : int, optional
            Number of held-out trials; default ``round(test_fraction * n_trials)``, at least 1.
        test_fraction : float, default 0.25
        seed : int, default 0

        Returns
        -------
        TrialSplit
            Sorted training and test trial indices and the seed; pass them to :meth:`select_trials`.
        """
        n = self.n_trials
        if n_test is None:
            n_test = max(1, int(round(test_fraction * n)))
        n_test = int(n_test)
        if n < 2 or not 1 <= n_test <= n - 1:
            raise SessionError(
                f"a held-out split needs at least 2 trials and 1 <= n_test <= n_trials - 1; this session has {n} "
                f"trial(s) and n_test={n_test}. Record more trials or split the recording into trials."
            )
        rng = np.random.default_rng(seed)
        perm = rng.permutation(n)
        test = tuple(sorted(int(i) for i in perm[:n_test]))
        train = tuple(sorted(int(i) for i in perm[n_test:]))
        return TrialSplit(train=train, test=test, seed=int(seed))

    def train_test(self, split: TrialSplit) -> tuple["Session", "Session"]:
        """The training and held-out sessions of a :class:`TrialSplit`."""
        return self.select_trials(split.train), self.select_trials(split.test)

    def replace(self, **changes) -> "Session":
        """A validated copy with some fields replaced (``dataclasses.replace``)."""
        return dataclasses.replace(self, **changes)

    # ----------------------------------------------------------------------------------------------- identity
    def content_hash(self) -> str:
        """SHA-256 over arrays, rate, trials, names and units (not metadata): identifies the data a fit saw."""
        h = hashlib.sha256()
        for a in (self.u, self.y, self.mask, self.trials):
            h.update(np.ascontiguousarray(a).tobytes())
            h.update(str(a.shape).encode())
        h.update(repr((self.sample_rate_hz, self.input_names, self.output_names,
                       self.input_units, self.output_units)).encode())
        if not self.output_mask.all():  # sessions without blanked outputs keep the hashes they always had
            h.update(b"output_mask")
            h.update(np.ascontiguousarray(self.output_mask).tobytes())
        return h.hexdigest()

    def __repr__(self) -> str:
        return (
            f"Session(n_samples={self.n_samples}, n_inputs={self.n_inputs}, n_outputs={self.n_outputs}, "
            f"n_trials={self.n_trials}, sample_rate_hz={self.sample_rate_hz:g})"
        )

