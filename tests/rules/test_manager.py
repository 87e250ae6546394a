"""The rule manager: discovery, start-up validation, isolation of failing rules; the session context."""

from __future__ import annotations

import json
import logging
import textwrap
from importlib.metadata import EntryPoint

import numpy as np
import pytest

import livequant
from livequant.config import ConfigError, Settings
from livequant.frames import FrameMeta
from livequant.rules import (BUILTIN_RULES, Flag, FrameView, Region, RuleManager, SessionContext,
                             hookimpl)
from livequant.rules.manager import MAD_TO_SIGMA


def _settings(**rules) -> Settings:
    return Settings.model_validate({"rules": rules})


def _view(frame_id="f1", cells=None) -> FrameView:
    return FrameView(frame_id=frame_id, meta=FrameMeta(frame_id=frame_id, pixel_size_pm=10.0),
                     shape=(64, 64), status="ok", summary={}, cells=cells)


def _write(folder, name, body):
    folder.mkdir(exist_ok=True)
    path = folder / f"{name}.py"
    path.write_text(textwrap.dedent(body))
    return path


GOOD = """
    from livequant import hookimpl
    from livequant.rules import Flag, Region

    LIMIT = {}

    @hookimpl
    def livequant_configure(config):
        LIMIT.update(config.rules.options.get("marker", {}))

    @hookimpl
    def livequant_frame_rules(view, context):
        return [Flag("marker", 0.5, Region(1, 2, 3, 4), f"seen {view.frame_id}",
                     {"n_frames": context.n_frames, "limit": LIMIT.get("limit")})]
"""


def test_hookimpl_is_exported_from_the_package():
    assert livequant.hookimpl is hookimpl and "hookimpl" in livequant.__all__


def test_builtins_load_in_order_and_status_is_json_ready():
    mgr = RuleManager.from_settings(Settings())
    assert mgr.names == list(BUILTIN_RULES)
    status = mgr.status()
    json.dumps(status)
    assert [r["name"] for r in status["rules"]] == list(BUILTIN_RULES)
    assert all(r["source"] == "builtin" and r["failures"] == 0 for r in status["rules"])
    # A frame without cells: every built-in returns nothing and nothing fails.
    assert mgr.evaluate(_view(), SessionContext().readonly()) == []
    assert mgr.status()["failures_total"] == 0


def test_builtins_are_blockable_by_name_and_unknown_names_are_errors():
    mgr = RuleManager.from_settings(_settings(blocked=["vortex_cores"]))
    assert "vortex_cores" not in mgr.names and len(mgr.names) == len(BUILTIN_RULES) - 1
    mgr = RuleManager.from_settings(_settings(enabled=["interfaces"]))
    assert mgr.names == ["interfaces"]
    with pytest.raises(ConfigError, match="unknown built-in rule.*vortex_core\\b"):
        RuleManager.from_settings(_settings(enabled=["vortex_core"]))


def test_plugin_from_a_folder_flags_with_its_options(tmp_path):
    folder = tmp_path / "rules"
    _write(folder, "marker", GOOD)
    _write(folder, "_helper", "raise RuntimeError('private files are not plugins')\n")
    s = Settings.model_validate({"rules": {"enabled": [], "plugin_dirs": [str(folder)],
                                           "options": {"marker": {"limit": 7}}}})
    mgr = RuleManager.from_settings(s)
    assert mgr.names == ["marker"]
    assert mgr.status()["rules"][0]["source"] == str(folder / "marker.py")
    ctx = SessionContext()
    ctx.update(_view("f0"), [])
    flags = mgr.evaluate(_view("f7"), ctx.readonly())
    assert len(flags) == 1
    f = flags[0]
    assert (f.kind, f.rule, f.frame_id, f.message) == ("marker", "marker", "f7", "seen f7")
    assert f.evidence == {"n_frames": 1, "limit": 7}
    assert mgr.status()["rules"][0]["flags"] == 1


class _Boom:
    def __init__(self, fail_on=lambda fid: True):
        self.fail_on = fail_on

    @hookimpl
    def livequant_frame_rules(self, view):
        if self.fail_on(view.frame_id):
            raise RuntimeError(f"broken on {view.frame_id}")
        return [Flag("boom", 0.1, Region(0, 0, 1, 1), "ok")]


class _Steady:
    @hookimpl
    def livequant_frame_rules(self, view):
        return [Flag("steady", 0.9, Region(5, 5, 2, 2), "always")]


def test_a_raising_rule_is_skipped_logged_counted_and_others_still_run(caplog):
    mgr = RuleManager(_settings(max_consecutive_failures=3))
    mgr.register(_Boom(), name="boom")
    mgr.register(_Steady(), name="steady")
    mgr.configure()
    ctx = SessionContext().readonly()
    with caplog.at_level(logging.ERROR, logger="livequant.rules.manager"):
        flags = mgr.evaluate(_view("frame-42"), ctx)
    assert [f.rule for f in flags] == ["steady"]
    assert any("boom" in r.getMessage() and "frame-42" in r.getMessage()
               and "broken on frame-42" in r.getMessage() for r in caplog.records)
    st = {r["name"]: r for r in mgr.status()["rules"]}
    assert st["boom"]["failures"] == 1 and not st["boom"]["disabled"]
    assert "RuntimeError" in st["boom"]["last_error"]
    # Two more in a row reach the limit: disabled, shown in the status, never called again.
    for k in range(2):
        mgr.evaluate(_view(f"f{k}"), ctx)
    st = mgr.status()
    assert st["disabled"] == ["boom"] and st["failures_total"] == 3
    assert [f.rule for f in mgr.evaluate(_view("after"), ctx)] == ["steady"]
    assert mgr.status()["failures_total"] == 3


def test_rules_run_in_registration_order():
    mgr = RuleManager(Settings())
    for name in ("c_first", "a_second", "b_third"):
        mgr.register(_Steady(), name=name)
    mgr.configure()
    flags = mgr.evaluate(_view(), SessionContext().readonly())
    assert [f.rule for f in flags] == mgr.names == ["c_first", "a_second", "b_third"]


def test_a_success_resets_the_run_of_failures():
    mgr = RuleManager(_settings(max_consecutive_failures=2))
    mgr.register(_Boom(fail_on=lambda fid: fid.startswith("bad")), name="flaky")
    mgr.configure()
    ctx = SessionContext().readonly()
    for fid in ("bad1", "good", "bad2", "good", "bad3"):
        mgr.evaluate(_view(fid), ctx)
    st = mgr.status()["rules"][0]
    assert st["failures"] == 3 and st["consecutive_failures"] == 1 and not st["disabled"]
    assert st["flags"] == 2


@pytest.mark.parametrize("result, what", [
    (Flag("x", 0.5, Region(0, 0, 1, 1), "bare flag"), "a list of Flag"),
    ([{"kind": "x"}], "non-Flag items: dict"),
    (3, "a list of Flag"),
])
def test_a_wrong_return_value_counts_as_a_failure(result, what, caplog):
    class Wrong:
        @hookimpl
        def livequant_frame_rules(self):
            return result

    mgr = RuleManager(Settings())
    mgr.register(Wrong(), name="wrong")
    mgr.configure()
    with caplog.at_level(logging.ERROR):
        assert mgr.evaluate(_view(), SessionContext().readonly()) == []
    assert mgr.status()["failures_total"] == 1
    assert what in caplog.text


def test_misspelled_hook_fails_at_start_up_naming_the_file(tmp_path):
    folder = tmp_path / "p"
    _write(folder, "typo", """
        from livequant import hookimpl

        @hookimpl
        def livequant_frame_rule(view):
            return []
    """)
    with pytest.raises(ConfigError, match=r"'typo'.*livequant_frame_rule'.*not a livequant hook"):
        RuleManager.from_settings(_settings(plugin_dirs=[str(folder)]))


def test_start_up_errors_name_the_rule(tmp_path):
    folder = tmp_path / "p"
    _write(folder, "unmarked", "def livequant_frame_rules(view):\n    return []\n")
    with pytest.raises(ConfigError, match="unmarked.*lacks the @hookimpl marker"):
        RuleManager.from_settings(_settings(plugin_dirs=[str(folder)]))

    folder2 = tmp_path / "q"
    _write(folder2, "badarg", """
        from livequant import hookimpl

        @hookimpl
        def livequant_frame_rules(view, frame):
            return []
    """)
    with pytest.raises(ConfigError, match="badarg.*frame"):
        RuleManager.from_settings(_settings(plugin_dirs=[str(folder2)]))

    folder3 = tmp_path / "r"
    path = _write(folder3, "broken", "import not_a_module_anywhere\n")
    with pytest.raises(ConfigError, match=f"{path}.*failed to import.*not_a_module_anywhere"):
        RuleManager.from_settings(_settings(plugin_dirs=[str(folder3)]))

    folder4 = tmp_path / "s"
    _write(folder4, "picky", """
        from livequant import hookimpl

        @hookimpl
        def livequant_configure(config):
            raise ValueError("`threshold` must be positive")
    """)
    with pytest.raises(ConfigError, match="picky.*rejected its configuration.*threshold"):
        RuleManager.from_settings(_settings(plugin_dirs=[str(folder4)]))

    with pytest.raises(ConfigError, match="not a folder"):
        RuleManager.from_settings(_settings(plugin_dirs=[str(tmp_path / "missing")]))


def test_blocked_plugin_file_is_not_loaded_and_duplicate_names_are_refused(tmp_path):
    folder = tmp_path / "p"
    _write(folder, "marker", GOOD)
    mgr = RuleManager.from_settings(_settings(plugin_dirs=[str(folder)], blocked=["marker"]))
    assert "marker" not in mgr.names
    _write(tmp_path / "q", "interfaces", GOOD)
    with pytest.raises(ConfigError, match="two rules are named 'interfaces'"):
        RuleManager.from_settings(_settings(plugin_dirs=[str(tmp_path / "q")]))


def test_stateful_rule_from_create_plugin_is_fresh_per_manager(tmp_path):
    folder = tmp_path / "p"
    _write(folder, "counter", """
        from livequant import hookimpl
        from livequant.rules import Flag, Region

        class Counter:
            def __init__(self):
                self.seen = 0

            @hookimpl
            def livequant_frame_rules(self, view):
                self.seen += 1
                return [Flag("count", 0.2, Region(0, 0, 1, 1), f"frame {self.seen}")]

        def create_plugin():
            return Counter()
    """)
    s = _settings(enabled=[], plugin_dirs=[str(folder)])
    a, b = RuleManager.from_settings(s), RuleManager.from_settings(s)
    ctx = SessionContext().readonly()
    for _ in range(3):
        a.evaluate(_view(), ctx)
    assert a.get_plugin("counter").seen == 3 and b.get_plugin("counter").seen == 0
    assert b.evaluate(_view(), ctx)[0].message == "frame 1"


def test_entry_point_plugins_are_discovered(monkeypatch):
    ep = EntryPoint(name="steady_ep", value="tests.rules.test_manager:_Steady", group="livequant")
    monkeypatch.setattr("livequant.rules.manager.entry_points",
                        lambda group: [ep] if group == "livequant" else [])
    mgr = RuleManager.from_settings(_settings(enabled=[]))
    assert mgr.names == ["steady_ep"]
    assert "tests.rules.test_manager:_Steady" in mgr.status()["rules"][0]["source"]
    assert [f.rule for f in mgr.evaluate(_view(), SessionContext().readonly())] == ["steady_ep"]
    bad = EntryPoint(name="gone", value="tests.rules.no_such_module", group="livequant")
    monkeypatch.setattr("livequant.rules.manager.entry_points", lambda group: [bad])
    with pytest.raises(ConfigError, match="'gone'.*failed to load"):
        RuleManager.from_settings(_settings(enabled=[]))


# ---------------------------------------------------------------- the session context


def test_running_statistics_are_the_median_and_mad_of_the_recent_cells():
    rng = np.random.RandomState(5)
    ctx = SessionContext(max_cells=1000)
    chunks = [rng.normal(390.0, 2.0, 400) for _ in range(4)]   # 1600 values: the buffer wraps
    for k, c in enumerate(chunks):
        ctx.update(_view(f"f{k}", cells={"a_pm": c}), [])
    st = ctx.readonly().stats["a_pm"]
    recent = np.concatenate(chunks)[-1000:]
    assert st.n == 1000 and st.n_total == 1600
    assert st.median == pytest.approx(np.median(recent))
    assert st.scale == pytest.approx(MAD_TO_SIGMA * np.median(np.abs(recent - np.median(recent))))
    # For normal data the MAD-based scale estimates the standard deviation (2 pm here).
    assert st.scale == pytest.approx(2.0, rel=0.1)
    assert ctx.readonly().stats["b_pm"].n == 0     # never seen: empty, not an error


def test_context_keeps_bounded_history_and_is_read_only():
    ctx = SessionContext(history=3)
    for k in range(5):
        ctx.update(_view(f"f{k}"), [Flag("x", 0.5, Region(0, 0, 1, 1), f"m{k}")])
    ctx.add_visited({"center_x_nm": 1, "center_y_nm": 2, "width_nm": 10, "height_nm": 10})
    view = ctx.readonly()
    assert view.n_frames == 5 and [f.message for f in view.flags] == ["m2", "m3", "m4"]
    assert view.visited[0]["rotation_deg"] == 0.0 and view.visited[0]["center_y_nm"] == 2.0
    with pytest.raises(TypeError):
        view.stats["a_pm"] = None
    with pytest.raises(TypeError):
        view.visited[0]["width_nm"] = 1.0
    with pytest.raises(AttributeError):
        view.n_frames = 9
    with pytest.raises(ValueError, match="missing width_nm"):
        ctx.add_visited({"center_x_nm": 1, "center_y_nm": 2, "height_nm": 3})
