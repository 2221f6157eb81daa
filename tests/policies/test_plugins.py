"""Policies installed packages declare through entry points (group ``moerun.policies``).

The packages are made as the packaging tools install them: a ``NAME-VERSION.dist-info`` directory with
``METADATA`` and ``entry_points.txt`` next to the module, on ``sys.path``.  Format: the PyPA "Entry points
specification" (https://packaging.python.org/en/latest/specifications/entry-points/), an INI file whose
section is the group and whose lines are ``name = module:attribute``; ``importlib.metadata`` reads it.
"""

from __future__ import annotations

import json
import sys

import numpy as np
import pytest

from moerun import policies
from moerun.cli import main as cli
from moerun.errors import BadOption

GOOD = '''
from moerun.policies import Policy, grow


class MostRecent(Policy):
    name = "mru"

    def __init__(self, n_keys=0, shared_experts=0):
        super().__init__(n_keys, shared_experts)
        self.last = [0] * n_keys

    def inserted(self, key, now):
        grow(self.last, key)
        self.last[key] = now

    def hit(self, key, now):
        self.last[key] = now

    def victim(self, candidates, now):
        return max(candidates, key=self.last.__getitem__)


class Misnamed(MostRecent):
    name = "something-else"


NOT_A_POLICY = 42
'''


def _install(site, dist: str, version: str, module: str, source: str, entries: dict[str, str]) -> None:
    (site / f"{module}.py").write_text(source)
    info = site / f"{dist}-{version}.dist-info"
    info.mkdir()
    (info / "METADATA").write_text(f"Metadata-Version: 2.1\nName: {dist}\nVersion: {version}\n")
    lines = "".join(f"{name} = {ref}\n" for name, ref in entries.items())
    (info / "entry_points.txt").write_text(f"[{policies.ENTRY_POINT_GROUP}]\n{lines}")


@pytest.fixture
def site(tmp_path, monkeypatch):
    """A fresh directory of installed packages on sys.path, and a registry that has read no plug-in yet."""
    d = tmp_path / "site"
    d.mkdir()
    monkeypatch.syspath_prepend(str(d))
    monkeypatch.setattr(policies, "_declared", None)
    monkeypatch.setattr(policies, "_PLUGINS", {})
    for mod in ("mru_plugin", "broken_plugin"):
        monkeypatch.delitem(sys.modules, mod, raising=False)
    yield d
    for mod in ("mru_plugin", "broken_plugin"):
        sys.modules.pop(mod, None)


@pytest.fixture
def trace(tmp_path):
    rng = np.random.default_rng(0)
    ex = np.sort(np.stack([rng.choice(8, 2, replace=False) for _ in range(60)]), axis=-1).reshape(60, 1, 2)
    path = tmp_path / "t.npz"
    np.savez(path, experts=ex, meta=np.array(json.dumps({"n_experts": 8})))
    return path


def test_a_policy_an_installed_package_declares_is_found_by_name_without_importing_it_until_named(site):
    _install(site, "mru-plugin", "1.2", "mru_plugin", GOOD, {"mru": "mru_plugin:MostRecent"})
    assert ("mru", "mru-plugin 1.2") in policies.plugins()
    assert "mru (plug-in: mru-plugin 1.2)" in policies.listing()
    assert "mru_plugin" not in sys.modules  # listed from the metadata alone
    cls = policies.get("mru")
    assert cls.__name__ == "MostRecent" and issubclass(cls, policies.Policy) and "mru_plugin" in sys.modules
    assert "mru" not in policies.names()  # the defaults (plan, verify) stay the registered policies


@pytest.mark.parametrize("command", ["generate", "verify", "score", "replay", "plan"])
def test_every_command_that_takes_evict_lists_the_installed_plugins_marked_in_its_help(site, capsys, command):
    _install(site, "mru-plugin", "1.2", "mru_plugin", GOOD, {"mru": "mru_plugin:MostRecent"})
    with pytest.raises(SystemExit) as stop:
        cli.main([command, "--help"])
    out = " ".join(capsys.readouterr().out.split())  # argparse wraps the help
    assert stop.value.code == 0
    assert "mru (plug-in: mru-plugin 1.2)" in out and "lru" in out and "orbit" in out


def test_a_plugin_policy_replays_from_the_command_line(site, trace, capsys):
    _install(site, "mru-plugin", "1.2", "mru_plugin", GOOD, {"mru": "mru_plugin:MostRecent"})
    code = cli.main(["replay", "--routing", str(trace), "--evict", "mru,lru", "--slots", "3", "--json", "--no-baselines"])
    out, err = capsys.readouterr()
    assert code == 0, err
    doc = json.loads(out)
    assert doc["policies"] == ["mru", "lru"] and any(r["policy"] == "mru" for r in doc["results"])


@pytest.mark.parametrize("source,ref,phrase", [
    ("raise ImportError('no module named torch_extras')\n", "broken_plugin:X", "cannot be loaded: ImportError: no module named torch_extras"),
    ("def oops(:\n", "broken_plugin:X", "cannot be loaded: SyntaxError"),
    ("import sys\nsys.exit(3)\n", "broken_plugin:X", "cannot be loaded: SystemExit"),
    ("X = 1\n", "broken_plugin:Missing", "cannot be loaded: AttributeError"),
    ("X = 42\n", "broken_plugin:X", "is not a subclass of moerun.policies.Policy"),
    (GOOD, "broken_plugin:Misnamed", "its class is named 'something-else'; set name = 'broken'"),
], ids=["import-error", "syntax-error", "exit", "no-attribute", "not-a-policy", "misnamed"])
def test_a_broken_plugin_is_one_line_naming_it_and_the_built_in_policies_still_work(site, trace, capsys, source, ref, phrase):
    _install(site, "broken-plugin", "0.1", "broken_plugin", source, {"broken": ref})
    with pytest.raises(BadOption, match="plug-in policy 'broken' .broken-plugin 0.1"):
        policies.get("broken")
    assert policies.get("lru") is policies.LRU
    code = cli.main(["replay", "--routing", str(trace), "--evict", "broken", "--slots", "2"])
    err = capsys.readouterr().err
    assert code == 2 and phrase in err and "broken-plugin 0.1" in err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert cli.main(["replay", "--routing", str(trace), "--evict", "lru,orbit", "--slots", "2", "--json", "--no-baselines"]) == 0
    with pytest.raises(SystemExit):  # the help still lists it (nothing imported to list it)
        cli.main(["replay", "--help"])
    assert "broken (plug-in: broken-plugin 0.1)" in " ".join(capsys.readouterr().out.split())


def test_a_plugin_never_replaces_a_built_in_policy_and_two_packages_with_one_name_are_refused(site):
    _install(site, "mru-plugin", "1.2", "mru_plugin", GOOD, {"lru": "mru_plugin:MostRecent", "mru": "mru_plugin:MostRecent"})
    _install(site, "other-plugin", "2.0", "broken_plugin", GOOD, {"mru": "broken_plugin:MostRecent"})
    assert policies.get("lru") is policies.LRU
    assert [n for n, _ in policies.plugins()] == ["mru"]
    with pytest.raises(BadOption, match="declared by more than one installed package"):
        policies.get("mru")


def test_unreadable_package_metadata_is_one_warning_and_no_plugins(monkeypatch):
    import importlib.metadata

    def fail(**kw):
        raise ValueError("damaged entry_points.txt")

    monkeypatch.setattr(policies, "_declared", None)
    monkeypatch.setattr(importlib.metadata, "entry_points", fail)
    with pytest.warns(UserWarning, match="policy plug-ins not read.*damaged entry_points.txt"):
        assert policies.plugins() == []
    assert policies.get("orbit") is policies.Orbit
    with pytest.raises(BadOption, match="unknown eviction policy 'nope'"):
        policies.get("nope")
