"""The review widget: look at candidate pairs and clusters in Jupyter and decide on them.

A thin ipywidgets view over :class:`curate.review_queue.ReviewSession`; every
decision goes through the session, which writes it to the workspace at once.
This is the only curate module that imports ipywidgets, and only when a widget
is built, so ``import curate`` never needs it.

In a notebook::

    from curate.review import review, review_clusters
    review("my-workspace", reviewer="ana")          # one pair at a time
    review_clusters("my-workspace", reviewer="ana")  # whole clusters as a grid

Keyboard: click the box labelled "keys" (it keeps the keys away from the
notebook's own shortcuts), then type ``1`` same image, ``2`` same lesion,
``3`` different lesions, ``s`` skip, ``u`` undo, ``n`` next, ``p`` previous,
``v`` cycle the view (side by side / difference / overlay). Works in
JupyterLab and the classic notebook without any extension.
"""

from __future__ import annotations

import getpass
import html
import os
import time

from curate.errors import OptionalDependencyError
from curate.review_queue import DECISION_WORDS, DECISIONS, ReviewSession
from curate.thumbnails import (
    ORIENTATION_NAMES,
    VIEW_MODES,
    ThumbnailCache,
    best_orientation,
    fit_square,
    pair_pictures,
    to_jpeg,
)

#: Keys typed into the key box, and what they do.
KEYS: dict[str, str] = {
    "1": "same_image",
    "2": "same_lesion",
    "3": "different_lesions",
    "s": "skip",
    "u": "undo",
    "n": "next",
    "p": "previous",
    "v": "view",
}
_KEY_OF = {action: key for key, action in KEYS.items()}
_VIEW_WORDS = {"side_by_side": "side by side", "difference": "difference", "overlay": "overlay"}


def _widgets():
    try:
        import ipywidgets
    except ImportError as exc:  # pragma: no cover - ipywidgets is a dependency
        raise OptionalDependencyError(
            "the review widget needs ipywidgets: pip install ipywidgets"
        ) from exc
    return ipywidgets


def default_reviewer() -> str:
    """The reviewer name used when none is given: $CURATE_REVIEWER, else the login name.

    Examples
    --------
    >>> import os
    >>> os.environ["CURATE_REVIEWER"] = "ana"; default_reviewer()
    'ana'
    >>> del os.environ["CURATE_REVIEWER"]
    """
    return os.environ.get("CURATE_REVIEWER") or getpass.getuser()


def _session(workspace, reviewer, filters) -> ReviewSession:
    if isinstance(workspace, ReviewSession):
        if filters:
            workspace.set_filter(**filters)
        return workspace
    return ReviewSession(workspace, reviewer=reviewer or default_reviewer(), **filters)


class _View:
    """Shared display plumbing: the widget tree is ``self.box``."""

    box = None

    def _repr_mimebundle_(self, **kwargs):
        return self.box._repr_mimebundle_(**kwargs)

    def _picture(self, image_id: int):
        info = self.session.image_info(image_id)
        return self.cache.get(info["path"], info["sha256"])


class ReviewWidget(_View):
    """One candidate pair at a time: both images, their metadata, distances and verdict.

    Parameters
    ----------
    workspace : Workspace, path or ReviewSession
        What to review; a session is used as it is.
    reviewer : str, optional
        Name stored with each decision (default :func:`default_reviewer`).
    size : int, default 320
        Display size in pixels of each image (both are shown at this size).
    thumbnail_size : int, default 256
        Size of the cached thumbnails (``WORKSPACE/thumbnails``).
    **filters
        ``verdict``, ``source``, ``conflict``, ``node``: see
        :class:`curate.review_queue.ReviewFilter`.

    Attributes
    ----------
    buttons : dict
        The decision buttons by code, plus ``undo``, ``previous`` and ``next``;
        ``buttons["same_image"].click()`` decides exactly as a mouse click does.
    keys : ipywidgets.Text
        Keyboard capture box; see the module docs.
    session : ReviewSession
        The logic underneath.
    """

    def __init__(self, workspace, *, reviewer: str | None = None, size: int = 320,
                 thumbnail_size: int = 256, **filters):
        w = _widgets()
        self.session = _session(workspace, reviewer, filters)
        self.cache = ThumbnailCache.for_workspace(self.session.workspace, size=thumbnail_size)
        self.size = int(size)
        self.mode = "side_by_side"
        self.last_render_ms = float("nan")

        px = f"{self.size}px"
        self.pictures = [
            w.Image(format="jpeg", layout=w.Layout(width=px, height=px, object_fit="contain"))
            for _ in range(3)
        ]
        self.captions = [w.HTML() for _ in range(3)]
        self.panels = [w.VBox([p, c], layout=w.Layout(width=px, margin="0 8px 0 0"))
                       for p, c in zip(self.pictures, self.captions)]
        self.panels[2].layout.display = "none"
        self.pair_info = w.HTML()
        self.status = w.HTML()
        self.progress_bar = w.IntProgress(min=0, max=1, value=0, layout=w.Layout(width="240px"))
        self.progress_text = w.HTML()

        self.buttons = {}
        styles = {"same_image": "info", "same_lesion": "success",
                  "different_lesions": "warning", "skip": ""}
        for code in DECISIONS:
            b = w.Button(description=f"{DECISION_WORDS[code]} [{_KEY_OF[code]}]",
                         button_style=styles[code], layout=w.Layout(width="auto"),
                         tooltip=f"record '{code}' for this pair (key {_KEY_OF[code]})")
            b.add_class(f"curate-decision-{code}")
            b.on_click(lambda _b, code=code: self.decide(code))
            self.buttons[code] = b
        for action, word in (("undo", "Undo"), ("previous", "Previous"), ("next", "Next")):
            b = w.Button(description=f"{word} [{_KEY_OF[action]}]", layout=w.Layout(width="auto"))
            b.add_class(f"curate-{action}")
            self.buttons[action] = b
        self.buttons["undo"].on_click(lambda _b: self.undo())
        self.buttons["previous"].on_click(lambda _b: self._move(self.session.previous))
        self.buttons["next"].on_click(lambda _b: self._move(self.session.next))

        self.view = w.ToggleButtons(options=[(_VIEW_WORDS[m], m) for m in VIEW_MODES],
                                    value="side_by_side", description="view [v]")
        self.view.observe(self._on_view, names="value")

        self.keys = w.Text(value="", placeholder="click here, then type 1 2 3 s u n p v",
                           description="keys", continuous_update=True,
                           layout=w.Layout(width="320px"))
        self.keys.add_class("curate-keys")
        self.keys.observe(self._on_keys, names="value")

        self.filters = self._filter_widgets(w)
        self.box = w.VBox([
            w.HBox([self.progress_bar, self.progress_text]),
            w.HBox(list(self.filters.values())),
            w.HBox(self.panels),
            self.pair_info,
            w.HBox([self.buttons[c] for c in DECISIONS]),
            w.HBox([self.buttons["undo"], self.buttons["previous"], self.buttons["next"],
                    self.view]),
            self.keys,
            self.status,
        ])
        self.box.add_class("curate-review")
        self.show()

    def __repr__(self) -> str:
        return f"ReviewWidget({self.session!r})"

    # --- filters -------------------------------------------------------------------

    def _filter_widgets(self, w) -> dict:
        """One dropdown per filter; labels are shown, ``self._filter_values`` maps them back."""
        s = self.session
        current = s.filter
        choices = {
            "verdict": [("any", None)] + [(v, v) for v in s.options("verdict")],
            "source": [("any", None)] + [(v, v) for v in s.options("source")],
            "conflict": [("any", None), ("with a conflict", True), ("without", False)]
            + [(c, c) for c in s.options("conflict")],
            "node": [("any", None)] + [(v, v) for v in s.options("node")],
        }
        self._filter_values = {name: dict(opts) for name, opts in choices.items()}
        out = {}
        for name, opts in choices.items():
            wanted = getattr(current, name)
            label = next((lab for lab, v in opts if v is wanted or (
                v is not None and not isinstance(v, bool) and v == wanted)), "any")
            # labels as values: a Dropdown whose value is None shows nothing selected
            dd = w.Dropdown(options=[lab for lab, _ in opts], value=label, description=name,
                            layout=w.Layout(width="220px"))
            dd.observe(self._on_filter, names="value")
            out[name] = dd
        return out

    def set_filter(self, **filters) -> None:
        """Set filter dropdowns by value (``verdict="near"``, ``conflict=True`` ...) and redraw."""
        for name, value in filters.items():
            labels = [lab for lab, v in self._filter_values[name].items()
                      if v is value or (not isinstance(v, bool) and v is not None and v == value)]
            if not labels:
                raise ValueError(f"{name}={value!r} is not one of the choices")
            self.filters[name].value = labels[0]

    def _on_filter(self, _change) -> None:
        self.session.set_filter(**{
            name: self._filter_values[name][dd.value] for name, dd in self.filters.items()})
        self.show()

    # --- actions -------------------------------------------------------------------

    def decide(self, decision: str) -> None:
        """Record ``decision`` on the shown pair and show the next undecided one."""
        item = self.session.current
        if item is None:
            self._say("nothing to decide: the queue is empty")
            return
        self.session.decide(decision)
        message = (f"saved: {DECISION_WORDS[decision].lower()} for images "
                   f"{item.image_a} and {item.image_b}")
        if self.session.done:
            message += "; every pair in this queue now has a decision"
        self.show(message)

    def undo(self) -> None:
        item = self.session.undo()
        if item is None:
            self.show("nothing to undo")
        else:
            self.show(f"undone: last decision on images {item.image_a} and {item.image_b}")

    def _move(self, step) -> None:
        step()
        self.show()

    def _on_view(self, change) -> None:
        self.mode = change["new"]
        self.show()

    def _on_keys(self, change) -> None:
        typed = change["new"]
        if not typed:
            return
        self.keys.value = ""
        for ch in typed.lower():
            self.press(ch)

    def press(self, key: str) -> None:
        """Act as if ``key`` was typed into the key box (see :data:`KEYS`)."""
        action = KEYS.get(key)
        if action is None:
            return
        if action in DECISION_WORDS:
            self.decide(action)
        elif action == "undo":
            self.undo()
        elif action == "next":
            self._move(self.session.next)
        elif action == "previous":
            self._move(self.session.previous)
        elif action == "view":
            i = VIEW_MODES.index(self.view.value)
            self.view.value = VIEW_MODES[(i + 1) % len(VIEW_MODES)]

    # --- drawing -------------------------------------------------------------------

    def show(self, message: str = "") -> None:
        """Draw the current pair (and prepare the next one's thumbnails)."""
        t0 = time.perf_counter()
        s = self.session
        p = s.progress()
        self.progress_bar.max = max(p.total, 1)
        self.progress_bar.value = p.decided
        self.progress_text.value = f"&nbsp;{html.escape(str(p))} (pair {s.position + 1 if len(s) else 0} of {len(s)})"
        item = s.current
        for b in (self.buttons[c] for c in DECISIONS):
            b.disabled = item is None
        if item is None:
            for pic in self.pictures:
                pic.value = b""
            for cap in self.captions:
                cap.value = ""
            self.pair_info.value = "<b>no candidate pairs match this filter</b>"
            self._say(message)
            return
        a, b = self._picture(item.image_a), self._picture(item.image_b)
        turn = best_orientation(a, b, item.orientation)
        pics = pair_pictures(a, b, orientation=turn, size=self.size, mode=self.mode)
        for pic, im in zip(self.pictures, pics):
            pic.value = to_jpeg(im)
        self.panels[2].layout.display = None if len(pics) == 3 else "none"
        self.captions[0].value = _image_caption(s.image_info(item.image_a), "A")
        self.captions[1].value = _image_caption(s.image_info(item.image_b), "B")
        self.captions[2].value = f"<b>{_VIEW_WORDS[self.mode]}</b> of A and turned B"
        self.pair_info.value = _pair_caption(item, turn)
        self.last_render_ms = (time.perf_counter() - t0) * 1000.0
        self._say(message)
        self._prefetch()

    def _prefetch(self) -> None:
        s = self.session
        if len(s) < 2:
            return
        nxt = s.item((s.position + 1) % len(s))
        for image_id in (nxt.image_a, nxt.image_b):
            self._picture(image_id)

    def _say(self, message: str) -> None:
        self.status.value = html.escape(message)


class ClusterWidget(_View):
    """A whole cluster of linked images as a grid; tick members to split them off.

    "Split off ticked" records ``different_lesions`` between each ticked image
    and every other image of the cluster; "Same lesion for the rest" records
    ``same_lesion`` for each undecided candidate pair inside the cluster.
    """

    def __init__(self, workspace, *, reviewer: str | None = None, size: int = 180,
                 thumbnail_size: int = 256, columns: int = 5, **filters):
        w = _widgets()
        self._w = w
        self.session = _session(workspace, reviewer, filters)
        self.cache = ThumbnailCache.for_workspace(self.session.workspace, size=thumbnail_size)
        self.size = int(size)
        self.columns = int(columns)
        self.chooser = w.Dropdown(description="cluster", layout=w.Layout(width="320px"))
        self.chooser.observe(lambda _c: self.show(), names="value")
        self.grid = w.GridBox(layout=w.Layout(
            grid_template_columns=f"repeat({self.columns}, {self.size + 10}px)"))
        self.split_button = w.Button(description="Split off ticked", button_style="warning")
        self.split_button.add_class("curate-split-off")
        self.split_button.on_click(lambda _b: self.split_off())
        self.confirm_button = w.Button(description="Same lesion for the rest",
                                       button_style="success", layout=w.Layout(width="auto"))
        self.confirm_button.on_click(lambda _b: self.confirm())
        self.status = w.HTML()
        self.ticks = {}
        self.box = w.VBox([self.chooser, self.grid,
                           w.HBox([self.split_button, self.confirm_button]), self.status])
        self.box.add_class("curate-clusters")
        self.refresh()

    @property
    def cluster(self) -> list[int]:
        return list(self.chooser.value or [])

    def refresh(self, message: str = "") -> None:
        """Recompute the clusters (after decisions) and show the first or the same one."""
        clusters = self.session.clusters()
        old = self.cluster
        options = [(f"{n + 1}: {len(c)} images", tuple(c)) for n, c in enumerate(clusters)]
        self.chooser.options = options
        keep = [v for _, v in options if old and old[0] in v]
        self.chooser.value = keep[0] if keep else (options[0][1] if options else None)
        self.show(message)

    def show(self, message: str = "") -> None:
        w = self._w
        tiles, self.ticks = [], {}
        for image_id in self.cluster:
            info = self.session.image_info(image_id)
            pic = w.Image(value=to_jpeg(fit_square(self._picture(image_id), self.size)), format="jpeg",
                          layout=w.Layout(width=f"{self.size}px", height=f"{self.size}px"))
            tick = w.Checkbox(value=False, description=f"split off {image_id}", indent=False)
            self.ticks[image_id] = tick
            tiles.append(w.VBox([pic, w.HTML(_image_caption(info, str(image_id))), tick]))
        self.grid.children = tiles
        self.split_button.disabled = self.confirm_button.disabled = not tiles
        self.status.value = html.escape(message or ("" if tiles else "no clusters to show"))

    def split_off(self) -> None:
        ticked = [i for i, t in self.ticks.items() if t.value]
        if not ticked:
            self.show("tick the images to split off first")
            return
        try:
            n = len(self.session.split_off(self.cluster, ticked))
        except ValueError as exc:
            self.show(str(exc))
            return
        self.refresh(f"split off images {ticked}: {n} decisions saved")

    def confirm(self) -> None:
        n = len(self.session.confirm_cluster(self.cluster))
        self.refresh(f"{n} pairs saved as same lesion")


def review(workspace, *, reviewer: str | None = None, **options) -> ReviewWidget:
    """Show the pair review widget for a workspace (see :class:`ReviewWidget`).

    Examples
    --------
    >>> import tempfile
    >>> from curate.store import Workspace
    >>> ws = Workspace.create(tempfile.mkdtemp())
    >>> with ws.transaction() as con:   # two catalog rows (files absent: placeholders shown)
    ...     for i in (1, 2):
    ...         _ = con.execute("INSERT INTO images(image_id, path, root, source, first_seen, "
    ...                         "last_seen) VALUES (?, ?, '/', 'clinic', '', '')", (i, f"/{i}.jpg"))
    ...     _ = con.execute("INSERT INTO pairs(image_a, image_b, score, verdict) "
    ...                     "VALUES (1, 2, 0.6, 'possible')")
    >>> w = review(ws, reviewer="ana")
    >>> w.buttons["different_lesions"].click()
    >>> str(w.session.progress())
    '1 of 1 decided'
    """
    return ReviewWidget(workspace, reviewer=reviewer, **options)


def review_clusters(workspace, *, reviewer: str | None = None, **options) -> ClusterWidget:
    """Show the cluster grid for a workspace (see :class:`ClusterWidget`)."""
    return ClusterWidget(workspace, reviewer=reviewer, **options)


def _image_caption(info: dict, title: str) -> str:
    def cell(v):
        return "—" if v is None or v == "" else html.escape(str(v))

    size = ""
    if info.get("width") is not None and info.get("height") is not None:
        size = f"{int(info['width'])}×{int(info['height'])} px"
    if info.get("size") is not None:
        size += f", {int(info['size']) / 1024:.0f} KiB"
    rows = [
        ("image", info["image_id"]),
        ("source", info.get("source")),
        ("patient", info.get("patient_id")),
        ("lesion", info.get("lesion_id")),
        ("label", info.get("label")),
        ("node", info.get("node")),
        ("captured", info.get("capture_date")),
        ("size", size or None),
        ("file", os.path.basename(str(info.get("path") or ""))),
    ]
    body = "".join(f"<tr><td style='padding-right:8px;color:#666'>{k}</td><td>{cell(v)}</td></tr>"
                   for k, v in rows)
    return f"<b>{html.escape(title)}</b><table style='font-size:12px'>{body}</table>"


def _pair_caption(item, turn: int) -> str:
    dist = ", ".join(f"{k} {('—' if v is None else v)}" for k, v in item.distances.items())
    decided = DECISION_WORDS[item.decision] if item.decision else "not decided yet"
    conflict = html.escape(item.conflict) if item.conflict else "none"
    return (
        f"<b>verdict:</b> {html.escape(item.verdict)} &nbsp; <b>score:</b> {item.score:.2f} "
        f"&nbsp; <b>conflict:</b> {conflict} &nbsp; <b>B shown:</b> "
        f"{ORIENTATION_NAMES[turn]}{', cropped' if item.crop else ''}<br>"
        f"<b>Hamming distances (bits):</b> {html.escape(dist)}<br>"
        f"<b>decision:</b> {html.escape(decided)}"
    )
