"""Importing moerun changes no environment variable; the command line chooses the BLAS threads before numpy loads.

Each check runs in a fresh interpreter (numpy reads the variables once, when it loads), with the BLAS
variables removed from its environment.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

from moerun.cli.main import BLAS_THREAD_VARIABLES


def _python(code: str) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in BLAS_THREAD_VARIABLES}
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120, check=True)
    return json.loads(out.stdout)


def test_import_moerun_leaves_the_environment_unchanged_and_numpy_unloaded():
    got = _python(
        "import json, os, sys\n"
        "before = dict(os.environ)\n"
        "import moerun\n"
        "print(json.dumps({'same': dict(os.environ) == before, 'numpy': 'numpy' in sys.modules}))\n"
    )
    assert got == {"same": True, "numpy": False}


def test_using_the_library_leaves_the_environment_unchanged():
    got = _python(
        "import json, os\n"
        "before = dict(os.environ)\n"
        "import moerun\n"
        "[getattr(moerun, name) for name in moerun.__all__]\n"
        "print(json.dumps({'same': dict(os.environ) == before}))\n"
    )
    assert got == {"same": True}


def test_the_entry_point_sets_one_blas_thread_before_numpy_loads():
    # the console script imports moerun.cli.main, then calls entry(): nothing before entry() may load numpy
    got = _python(
        "import json, os, sys\n"
        "import moerun.cli.main as m\n"
        "loaded = 'numpy' in sys.modules\n"
        "m.one_blas_thread()\n"
        "print(json.dumps({'numpy_before': loaded, 'vars': [os.environ.get(v) for v in m.BLAS_THREAD_VARIABLES]}))\n"
    )
    assert got == {"numpy_before": False, "vars": ["1", "1", "1"]}


def test_the_entry_point_keeps_a_choice_the_environment_made():
    env = {k: v for k, v in os.environ.items() if k not in BLAS_THREAD_VARIABLES}
    env["OPENBLAS_NUM_THREADS"] = "2"
    code = "import os, moerun.cli.main as m; m.one_blas_thread(); print(os.environ['OPENBLAS_NUM_THREADS'])"
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120, check=True)
    assert out.stdout.strip() == "2"


def test_python_dash_m_moerun_sets_one_blas_thread_before_numpy_loads():
    # 'python -m moerun --version' as it runs: the package, then moerun.__main__ -> entry(), then the commands (numpy);
    # a finder placed first on sys.meta_path notes the variable at the moment numpy is first imported
    got = _python(
        "import json, os, runpy, sys\n"
        "seen = {}\n"
        "class Spy:\n"
        "    def find_spec(self, name, path=None, target=None):\n"
        "        if name == 'numpy' and 'at_numpy' not in seen:\n"
        "            seen['at_numpy'] = os.environ.get('OPENBLAS_NUM_THREADS')\n"
        "        return None\n"
        "sys.meta_path.insert(0, Spy())\n"
        "sys.argv = ['moerun', '--version']\n"
        "out, sys.stdout = sys.stdout, open(os.devnull, 'w')\n"
        "try:\n"
        "    runpy.run_module('moerun', run_name='__main__', alter_sys=True)\n"
        "except SystemExit:\n"
        "    pass\n"
        "out.write(json.dumps(seen) + '\\n')\n"
    )
    assert got == {"at_numpy": "1"}
