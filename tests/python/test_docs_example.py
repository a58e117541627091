"""The notebook-style example of docs/python.md runs as written: its
```python blocks are executed in order, in one namespace, in an empty
folder."""
import os
import re

from conftest import TOP


def test_docs_example(tmp_path, monkeypatch, capsys):
    text = open(os.path.join(TOP, "docs", "python.md")).read()
    blocks = re.findall(r"^```python\n(.*?)^```", text, flags=re.S | re.M)
    assert len(blocks) >= 5, "docs/python.md lost its example"
    monkeypatch.chdir(tmp_path)
    ns = {"__name__": "docs_example"}
    for i, code in enumerate(blocks):
        exec(compile(code, f"docs/python.md block {i + 1}", "exec"), ns)
    out = capsys.readouterr().out
    assert "(2, 49152) float64" in out
    assert "l_peak = " in out and "Omega_k = " in out
    assert "3 cannot open" in out  # the FileError's status and message
    assert "C_l^EE / C_l^BB, l = 50..100: " in out  # the polarization block ran
