"""The window's switch for the opt-in backdrop correction (core/backdrop_correction.py): Folder menu,
"Correct for backdrops…" and "Backdrop correction off" (no keys).

"Correct for backdrops…" runs `Project.backdrop_correction(clusters)` as an engine job on the group
page's progress bar, with its Cancel (a cancel changes nothing). When it ends, the groups are formed
again in the corrected space (the neighbour graph is rebuilt with its own progress, as after a relearn)
and the page says the outcome in one line: how many backdrop groups of how many photos, and, once 50
photos carry labels, whether the labels say it helps or hurts. "Backdrop correction off" switches it
off (also a job: the groups are formed again in the uncorrected space).

No engine work here is new: this only wires the engine's verb to the window's jobs (`_run`,
`_propose_in_background`)."""
from __future__ import annotations

from PySide6.QtGui import QAction

from core.backdrop_correction import DEFAULT_CLUSTERS, SETTING

VERDICT = {"helps": "it helps this collection",
           "hurts": "it hurts this collection: Folder ▸ Backdrop correction off switches it off",
           "no clear difference": "no clear difference yet"}


def outcome_line(info: dict) -> str:
    """One line for a finished correction (the dict `Project.backdrop_correction` returns)."""
    if info.get("cancelled"):
        return "Backdrop correction stopped: nothing changed."
    sizes = ", ".join(map(str, info["sizes"]))
    unread = f"; {info['unreadable']} photos could not be read" if info.get("unreadable") else ""
    line = (f"Backdrop correction on: {info['photos']} photos in {info['clusters']} backdrop groups "
            f"({sizes}){unread}.")
    check = info.get("check")
    if check:
        line += (f" Your {check['labelled']} labelled photos: nearest labelled photos agree "
                 f"{check['before']:.3f} without it, {check['after']:.3f} with it: {VERDICT[check['verdict']]}.")
    else:
        line += " With 50 labelled photos it can say whether it helps."
    return line


def is_on(project) -> bool:
    return bool(project.store.get_setting(SETTING))


def install(window) -> dict[str, QAction]:
    """Add the two actions to the window's Folder menu (before Relearn); returns them by name."""
    on = QAction("Correct for backdrops…", window)
    on.setToolTip("Group photos by the object rather than the backdrop they were shot on (for photos "
                  "taken on a few backdrops; opt-in, switch it off again in this menu)")
    on.triggered.connect(lambda _=False: start(window))
    off = QAction("Backdrop correction off", window)
    off.setToolTip("Form groups from the photos' features as they are again")
    off.triggered.connect(lambda _=False: switch_off(window))
    for a in (on, off):
        a.setProperty("section", "Folder")
    folder = next(a.menu() for a in window.menuBar().actions() if a.menu() and a.text() == "&Folder")
    folder.insertAction(window.actions["relearn"], on)
    folder.insertAction(window.actions["relearn"], off)
    window.backdrop_actions = {"backdrop": on, "backdrop_off": off}
    return window.backdrop_actions


def _run(window, name: str, clusters: int | None, start_line: str) -> None:
    if window.project is None or window._busy():
        return
    page, project = window.group_page, window.project
    page.busy.show()
    page.say(start_line)

    def work(progress, cancel):
        if clusters is None and not is_on(project):
            return {"was_off": True}

        def report(done, total, message):
            progress(done, total, f"Looking at each photo's backdrop: {done:,} of {total:,} photos")
        return project.backdrop_correction(clusters, progress=report, cancel=cancel)

    def done(info):
        page.busy.unit = unit
        info = info or {}
        if info.get("was_off"):
            page.busy.hide()
            window.last_backdrop = "The backdrop correction is not on."
            page.say(window.last_backdrop)
            return
        if info.get("cancelled"):
            page.busy.hide()
            window.last_backdrop = outcome_line(info)
            page.say(window.last_backdrop)
            return
        line = outcome_line(info) if clusters is not None else \
            "Backdrop correction off: groups are formed from the photos' features as they are."
        window.last_backdrop = line
        page.say(line + " Forming groups again…")
        window._propose_in_background(page.busy, line)

    unit, page.busy.unit = page.busy.unit, "photos"        # the bar counts photos, as the scan's does
    window._run(name, work, page.busy, done).failed.connect(lambda _: setattr(page.busy, "unit", unit))


def start(window, clusters: int = DEFAULT_CLUSTERS) -> None:
    _run(window, "correcting for backdrops", clusters, "Looking at each photo's backdrop…")


def switch_off(window) -> None:
    _run(window, "switching the backdrop correction off", None, "Switching the backdrop correction off…")
