"""The demo's JSON records name the files where they stay (control/demo.py, _record_final_paths): records that name
the temporary folder are rewritten, as written or as JSON escapes the name; the others are left byte for byte."""

import json

from stimsteer.control import demo
from stimsteer.control.demo import _record_final_paths


def test_records_naming_the_temporary_folder_are_rewritten_and_the_others_left_alone(tmp_path, monkeypatch):
    parsed = []
    monkeypatch.setattr(demo.json, "loads", lambda text, _loads=json.loads: parsed.append(text) or _loads(text))
    for name in ("run.tmp", "rún.tmp"):  # the second is written \\u-escaped by json.dumps (ensure_ascii)
        tmp, out = tmp_path / name, tmp_path / name.replace(".tmp", "")
        (tmp / "models").mkdir(parents=True)
        (tmp / "plan.json").write_text(json.dumps({"model": str(tmp / "models" / "m.h5"), "n": [1, 2]}),
                                       encoding="utf-8")
        compact = '{"a":[1,2],"source":"/elsewhere/session.h5"}'  # no temporary path: not read as JSON, not rewritten
        (tmp / "results.json").write_text(compact, encoding="utf-8")
        parsed.clear()
        _record_final_paths(tmp, out)
        assert len(parsed) == 1  # only the record that names the temporary folder is parsed (the bench's are 3 MB)
        assert json.loads((tmp / "plan.json").read_text(encoding="utf-8")) == {"model": str(out / "models" / "m.h5"),
                                                                              "n": [1, 2]}
        assert (tmp / "results.json").read_text(encoding="utf-8") == compact
