"""The rule hooks: what a decision rule may implement.

A rule is a plain object (a module, or an instance of a small class when it
keeps state) with functions marked ``@hookimpl`` whose names are the hooks
below.  An implementation may accept any subset of a hook's arguments, by
name; hooks are always called with keywords, so arguments added in later
versions never break an old rule.

The :class:`~livequant.rules.manager.RuleManager` registers the built-in
rules (``livequant/rules/builtin/``), the entry points of group
``livequant`` and the ``*.py`` files of the folders in
``rules.plugin_dirs``, then checks every implementation against these specs
before the first frame (a misspelled hook name stops start-up).

Unlike plain pluggy, the manager calls each rule's implementation on its own:
a rule that raises is logged, counted and skipped for that frame, and the
other rules still run.

Example::

    from livequant import hookimpl
    from livequant.rules import Flag, Region

    @hookimpl
    def livequant_frame_rules(view, context):
        ...
        return [Flag("hotspot", 0.8, Region(x, y, w, h), "one line", {"value": v})]
"""

from __future__ import annotations

import pluggy

__all__ = ["hookspec", "hookimpl", "PROJECT", "livequant_configure", "livequant_frame_rules"]

#: The pluggy project name; also the entry-point group rules are discovered from.
PROJECT = "livequant"

hookspec = pluggy.HookspecMarker(PROJECT)
hookimpl = pluggy.HookimplMarker(PROJECT)


@hookspec(historic=True)
def livequant_configure(config):
    """Receive the session's settings once, before the first frame.

    When
        At start-up, after every rule is registered and validated; a rule
        registered later receives the same call on registration (historic).
        Called once per rule, in the main process.

    Parameters
    ----------
    config : livequant.config.Settings
        The validated, frozen settings of the session.  A rule reads its
        thresholds from here: built-in rules from their own table
        (``config.rules.domain_walls`` ...), user rules from their free-form
        table ``config.rules.options.get("NAME", {})`` (``[rules.options.NAME]``
        in the TOML file, ``NAME`` being the rule's name: the file stem for a
        plugin folder, the entry-point name otherwise).

    Returns
    -------
    None

    Mutation
        Must not mutate `config` (it is frozen).  May store what it needs on
        its own object (a stateful rule is a small class instance).

    Raises
    ------
    Anything
        Turned into a :class:`~livequant.config.ConfigError` naming the
        rule: start-up stops with that message.  Raise ``ValueError`` with a
        clear text for a bad option.
    """


@hookspec
def livequant_frame_rules(view, context, config):
    """Look at one analysed frame and return what deserves attention.

    When
        In the daemon's main process, once per analysed frame, after the
        frame's outputs are written and before its proposals are made.  The
        frames arrive in processing order (the newest may jump the backlog,
        so frame ids need not be monotonic).

    Parameters
    ----------
    view : livequant.rules.FrameView
        The frame's results: ``view.cells`` (columnar per-cell table in
        frame pixels and pm, every descriptor with its ``sigma_``),
        ``view.columns``, ``view.summary`` (``summary.json``, with the
        ``cells`` block holding the wall fit and the topological cores),
        ``view.meta`` (stage position, scan rotation, pixel size) and
        ``view.shape``.  ``view.cells`` is None when the frame has no cells
        (``view.status`` says why); return ``[]`` then.  Read-only.
    context : livequant.rules.SessionView
        Read-only snapshot of the session before this frame: running robust
        statistics of every descriptor over the session's cells
        (``context.stats["a_pm"].median`` / ``.scale`` / ``.n``), earlier
        flags, and the stage regions already visited.
    config : livequant.config.Settings
        The same settings `livequant_configure` received.

    Returns
    -------
    list of livequant.rules.Flag, or None
        The findings, regions in the frame's pixels.  ``rule`` and
        ``frame_id`` are filled in by the manager.  Anything else counts as a
        failure of the rule.

    Mutation
        Must not mutate `view`, `context` or `config` (arrays are
        read-only).  A stateful rule may update its own object.

    Raises
    ------
    Anything
        Logged with the rule's name and the frame id, counted, and the
        rule's flags for that frame are dropped; the other rules still run.
        After ``rules.max_consecutive_failures`` failures in a row the rule
        is disabled for the rest of the session (shown in the status).
    """
