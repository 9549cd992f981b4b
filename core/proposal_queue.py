"""The proposal queue: groups keep their ids until decided, and the queue stays as it is while nothing
is decided.

A group once returned keeps its id until it is decided: it stays open (in the store) while its photos
are all still free. Groups are formed BATCH at a time from the photos no open group holds; the queue is
the open groups ranked with one new batch, then further batches, each ranked, as far as `limit` asks,
so the first groups do not depend on `limit`. While no decision is made the queue stays as it is
(`mark`: relearned version, decisions, photos); after one, only the groups not returned yet are formed
again — the groups already shown stay, unless a decision took one of their photos. Pinned groups (split
parts, groups an undo brought back) come first, with their members still free.
"""
from __future__ import annotations

import contextlib

import numpy as np

from core import calibrated_order, proposals
from core.group import Group

# Groups are formed this many at a time (each batch ranked on its own), so the first groups do not
# depend on how many are asked for. 3 is what the yield figures were measured with (the simulator
# asks for 3 at a time): with hold=1 its run on Fashion-MNIST 2,000 is the same, group for group,
# as before group numbers were kept.
BATCH = 3


def propose(project, limit: int = 20, settings: proposals.Settings | None = None,
            hold: int | None = None) -> list[Group]:
    """`Project.propose` (see there); `project` is a core.project.Project, its lock held."""
    if not project._rows or limit <= 0:
        return []
    s = settings or proposals.Settings()
    mark = dict(version=project.store.active_relearn_version(), decisions=project.label_state.decisions,
                photos=len(project._rows))
    saved = project.store.get_setting("proposal_queue") or dict(mark=mark, order=[], unshown=[])
    same = saved["mark"] == mark
    new_version = saved["mark"]["version"] != mark["version"]
    unshown = set(saved["unshown"])
    state, label_of, names = project.label_arrays()
    taken = np.zeros(len(project._rows), bool)
    pinned: list[Group] = []
    kept: dict[int, Group] = {}
    close: list[int] = []
    for row in project.store.open_proposals():      # pinned first, then in the order they were made
        idx = [project._index.get(m) for m in row.members]
        if row.pinned:
            # Shown with the members still free (the others were decided one by one).
            idx = [i for i in idx if i is not None and state[i] == proposals.FREE and not taken[i]]
        elif (new_version or (row.id in unshown and not same) or not idx
              or any(i is None or state[i] != proposals.FREE or taken[i] for i in idx)):
            idx = []                 # formed under other figures, or a member was decided or is gone
        if not idx:
            close.append(row.id)
            continue
        taken[idx] = True
        p = Group(row.id, [project._rows[i].path for i in idx], row.trust, row.suggested_label,
                  row.confidence, row.kind)
        if row.pinned:
            pinned.append(p)
        else:
            kept[row.id] = p

    fresh: list[dict] = []           # groups formed now, stored below; negative ids until then
    deferred = project.label_state.deferred
    graph = classifier = rescore = None
    calibrated = calibrated_order.check(s.order) == calibrated_order.CALIBRATED

    def batch() -> list[Group]:
        nonlocal graph, classifier, rescore
        if graph is None:
            graph, classifier = project.graph(), project.label_classifier(names)
            if calibrated:
                rescore = calibrated_order.rescorer(project.calibration(), graph)
        eligible = ~taken
        if deferred.any():
            rested = eligible & ~deferred
            # Photos left for later come back once nothing else is left.
            if (rested & (state == proposals.FREE)).any():
                eligible = rested
        out = []
        for gr in proposals.form_groups(graph, state, label_of, len(names), BATCH, s, eligible,
                                        project.label_state.not_label(), classifier, rescore, names):
            taken[gr.members] = True
            fresh.append(dict(members=[project._rows[i].path for i in gr.members], trust=round(gr.trust, 4),
                              suggested_label=None if gr.suggested_label is None else names[gr.suggested_label],
                              confidence=None if gr.confidence is None else round(gr.confidence, 4),
                              kind=gr.kind))
            r = fresh[-1]
            out.append(Group(-len(fresh), r["members"], r["trust"], r["suggested_label"], r["confidence"],
                             r["kind"]))
        return out

    if same:
        order = [i for i in saved["order"] if i in kept]
        queue = [kept[i] for i in order] + [p for i, p in kept.items() if i not in set(order)]
    else:
        queue = _ranked(list(kept.values()) + batch(), s.explore_every, project if calibrated else None)
    want = limit - len(pinned)
    while len(queue) < want:
        more = batch()
        if not more:
            break
        queue += _ranked(more, s.explore_every, project if calibrated else None)

    with project.store.transaction() if (close or fresh) else _nothing():
        ids = project.store.update_open_proposals(close, fresh) if (close or fresh) else []
        for p in queue:
            if p.id < 0:
                p.id = ids[-p.id - 1]
        new_ids = set(ids)
        shown = queue[:max(want, 0)]
        held = len(shown) if hold is None else max(hold - len(pinned), 0)
        now = dict(mark=mark, order=[p.id for p in queue],
                   unshown=[p.id for p in queue[held:] if p.id in unshown or p.id in new_ids])
        if now != saved:
            project.store.set_setting("proposal_queue", now)
    return (pinned + shown)[:limit]


@contextlib.contextmanager
def _nothing():
    yield


def _ranked(groups: list[Group], every: int, project=None) -> list[Group]:
    """Open groups in the order of expected photos per action (proposals.order), from the figures
    stored with each, ties in the order they were made. With `project` (Settings.order "calibrated"):
    from the project's calibrated trust instead (core/calibrated_order.py)."""
    if project is not None and groups:
        yields = calibrated_order.ranked_yields(
            project.calibration(), project.graph(),
            [([project._index[m] for m in p.members], p.suggested_label is not None, p.confidence)
             for p in groups])
    items = []
    for k, p in enumerate(groups):
        conf = p.confidence if p.kind == "probable label" and p.confidence is not None else p.trust
        g = proposals.Group(list(range(len(p.members))), p.trust, p.kind, 0 if p.suggested_label else None,
                            p.confidence)
        g.extra["expected_yield"] = (float(yields[k]) if project is not None
                                     else proposals.expected_yield(g, np.full(len(p.members), conf)))
        g.extra["proposal"] = p
        items.append(g)
    return [g.extra["proposal"] for g in proposals.order(items, every)]


