"""One compile serves every name of the same interpreter (httpstan's program names)."""

import os
import subprocess
import sys

import pytest

NAME_OF = ("import sys; {pre}import httpstan.models; "
           "print(sys.executable); print(httpstan.models.calculate_model_name('parameters {{ real a; }}'))")


def _names(python: str, pre: str) -> tuple[str, str]:
    out = subprocess.run([python, "-c", NAME_OF.format(pre=pre)], capture_output=True, text=True,
                         check=True, env={**os.environ, "PYTHONWARNINGS": "ignore"}).stdout.split()
    return out[-2], out[-1]


def _two_names() -> tuple[str, str]:
    a, b = (os.path.join(sys.prefix, "bin", n) for n in ("python", "python3"))
    if not (os.path.exists(a) and os.path.exists(b) and os.path.samefile(a, b)):
        pytest.skip("not in a virtual environment with bin/python and bin/python3 as one interpreter")
    return a, b


def test_python_and_python3_of_one_environment_share_compiled_programs():
    a, b = _two_names()
    # the defect: httpstan hashes sys.executable, so the two names give two program names
    # (httpstan/models.py, calculate_model_name: "include sys.executable in hash")
    assert _names(a, "")[1] != _names(b, "")[1]
    # with our engine loaded first, both are one interpreter and one compiled program
    pre = "import contenders.engines.pystan_engine; "
    (exe_a, name_a), (exe_b, name_b) = _names(a, pre), _names(b, pre)
    assert exe_a == exe_b == os.path.join(sys.prefix, "bin", "python3")
    assert name_a == name_b


def test_an_interpreter_outside_the_environment_keeps_its_own_name(tmp_path, monkeypatch):
    from contenders.engines import pystan_engine

    monkeypatch.setattr(sys, "executable", str(tmp_path / "elsewhere" / "python"))
    assert pystan_engine.one_interpreter_name() == str(tmp_path / "elsewhere" / "python")
