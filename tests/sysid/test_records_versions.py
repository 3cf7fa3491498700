"""Versions in provenance (sysid/_records.py): read from the installed metadata once per process.

Reference: importlib.metadata's own answer for each package (the standard library)."""

from stimsteer.sysid import _records


def test_versions_read_each_package_once_and_give_each_caller_its_own_dict(monkeypatch):
    calls = []
    real = _records._metadata.version

    def counted(dist):
        calls.append(dist)
        return real(dist)

    monkeypatch.setattr(_records, "_VERSIONS", {})
    monkeypatch.setattr(_records._metadata, "version", counted)
    first = _records.versions(extra=("no-such-package-stimsteer",))
    first["numpy"] = "changed by a caller"
    second = _records.versions(extra=("no-such-package-stimsteer",))
    assert second["numpy"] == real("numpy") and second["no-such-package-stimsteer"] == "not installed"
    assert sorted(calls) == sorted({*_records.CORE_PACKAGES, "no-such-package-stimsteer"})  # once each
