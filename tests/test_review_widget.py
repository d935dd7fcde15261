"""The review widgets, driven by pressing their buttons in Python (no browser)."""

import io
import subprocess
import sys

import numpy as np
import pytest
from PIL import Image
from review_workspace import make_review_workspace

from curate.review_queue import current_decisions

widgets = pytest.importorskip("ipywidgets")

from curate.review import ClusterWidget, ReviewWidget, review  # noqa: E402


@pytest.fixture
def ws(tmp_path):
    return make_review_workspace(tmp_path)


def jpeg(picture):
    return Image.open(io.BytesIO(picture.value))


def decisions(ws):
    return current_decisions(ws)[["image_a", "image_b", "decision", "reviewer"]].values.tolist()


def test_importing_curate_does_not_import_ipywidgets():
    code = "import curate, curate.review_queue, curate.thumbnails, sys; print('ipywidgets' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_both_images_show_at_the_same_size_with_their_metadata(ws):
    r = review(ws, reviewer="ana", size=200)
    assert isinstance(r.box, widgets.VBox)
    a, b = jpeg(r.pictures[0]), jpeg(r.pictures[1])
    assert a.format == b.format == "JPEG" and a.size == b.size == (200, 200)
    assert r.panels[2].layout.display == "none"  # no third picture in side-by-side mode
    assert "P0" in r.captions[0].value and "P99" in r.captions[1].value
    assert "melanoma" in r.captions[1].value and "2020-01-02" in r.captions[1].value
    assert "possible" in r.pair_info.value and "phash 8" in r.pair_info.value
    assert "0 of 6 decided" in r.progress_text.value
    # the bundle Jupyter displays is the widget's own
    assert "application/vnd.jupyter.widget-view+json" in r._repr_mimebundle_()


def test_clicking_a_decision_button_saves_it_and_shows_the_next_pair(ws):
    r = ReviewWidget(ws, reviewer="ana")
    r.buttons["different_lesions"].click()
    assert decisions(ws) == [[1, 9, "different_lesions", "ana"]]
    assert r.session.current.key == (3, 5)
    assert "1 of 6 decided" in r.progress_text.value and r.progress_bar.value == 1
    r.buttons["same_lesion"].click()
    r.buttons["undo"].click()
    assert decisions(ws) == [[1, 9, "different_lesions", "ana"]]
    assert r.session.current.key == (3, 5)
    r.buttons["skip"].click()
    assert r.session.current.key == (1, 2)
    r.buttons["previous"].click()
    assert r.session.current.key == (3, 5)
    r.buttons["next"].click()
    r.buttons["same_image"].click()
    assert [d[:3] for d in decisions(ws)] == [
        [1, 2, "same_image"], [1, 9, "different_lesions"], [3, 5, "skip"]]


def test_the_widget_says_when_every_pair_is_decided(ws):
    r = ReviewWidget(ws, reviewer="ana", verdict="possible")
    r.buttons["same_lesion"].click()
    assert "now has a decision" not in r.status.value
    r.buttons["different_lesions"].click()
    assert "every pair in this queue now has a decision" in r.status.value
    assert "2 of 2 decided" in r.progress_text.value


def test_keys_typed_into_the_key_box_act_like_buttons(ws):
    r = ReviewWidget(ws, reviewer="ana")
    r.keys.value = "3"
    assert r.keys.value == ""  # the box empties itself after each key
    r.keys.value = "2u"
    assert decisions(ws) == [[1, 9, "different_lesions", "ana"]]
    r.keys.value = "v"
    assert r.view.value == "difference" and r.panels[2].layout.display is None
    r.keys.value = "x"  # unknown keys do nothing
    assert len(decisions(ws)) == 1


def test_the_difference_view_shows_the_turned_copy_matching_the_original(ws):
    r = ReviewWidget(ws, reviewer="ana", size=160, verdict="near")
    assert r.session.current.key == (1, 2)  # image 2 is image 1 turned 90 degrees
    r.view.value = "difference"
    diff = np.asarray(jpeg(r.pictures[2]), dtype=float)
    a = np.asarray(jpeg(r.pictures[0]), dtype=float)
    b = np.asarray(jpeg(r.pictures[1]), dtype=float)
    assert np.abs(a - b).mean() < 6  # orientation 3 has turned b back onto a
    assert diff.mean() < 20
    r.view.value = "overlay"
    assert jpeg(r.pictures[2]).size == (160, 160)


def test_filters_change_the_queue(ws):
    r = ReviewWidget(ws, reviewer="ana")
    assert [dd.value for dd in r.filters.values()] == ["any"] * 4
    r.filters["conflict"].value = "with a conflict"
    assert len(r.session) == 1 and r.session.current.key == (1, 9)
    r.filters["conflict"].value = "any"
    r.set_filter(verdict="near", node="melanoma")
    assert len(r.session) == 0 and r.session.current is None
    assert r.buttons["same_image"].disabled
    assert "no candidate pairs" in r.pair_info.value
    r.buttons["same_image"].click()  # disabled in the browser; a stray call does nothing
    assert decisions(ws) == []
    with pytest.raises(ValueError, match="not one of the choices"):
        r.set_filter(verdict="blurry")
    started = ReviewWidget(ws, reviewer="ana", source="south")
    assert started.filters["source"].value == "south" and len(started.session) == 4


def test_thumbnails_are_made_once_and_then_read_from_the_cache(ws):
    r = ReviewWidget(ws, reviewer="ana")
    made = r.cache.made
    assert made >= 2
    files = sorted((ws.path / "thumbnails").rglob("*.jpg"))
    assert len(files) == made
    again = ReviewWidget(ws, reviewer="ana")
    assert again.cache.made == 0


def test_cluster_grid_splits_off_ticked_members(ws):
    c = ClusterWidget(ws, reviewer="ana")
    assert c.cluster == [3, 4, 5, 6] and len(c.grid.children) == 4
    c.chooser.value = (1, 2, 9)
    c.ticks[9].value = True
    c.split_button.click()
    assert [d[:3] for d in decisions(ws)] == [[1, 9, "different_lesions"], [2, 9, "different_lesions"]]
    assert c.cluster == [1, 2]
    c.confirm_button.click()
    assert [d[:3] for d in decisions(ws)][0] == [1, 2, "same_lesion"]
    c.split_button.click()  # nothing ticked: nothing saved
    assert len(decisions(ws)) == 3 and "tick" in c.status.value


def test_an_empty_workspace_shows_an_empty_queue_without_errors(tmp_path):
    from curate.store import Workspace

    ws = Workspace.create(tmp_path / "empty")
    r = ReviewWidget(ws, reviewer="ana")
    assert "no candidate pairs" in r.pair_info.value
    r.buttons["undo"].click()
    r.buttons["next"].click()
    r.press("1")
    assert "queue is empty" in r.status.value and decisions(ws) == []
    assert "no clusters" in ClusterWidget(ws, reviewer="ana").status.value


def test_the_caption_names_the_turn_actually_applied(ws):
    # image 2 is image 1 turned 90 degrees anticlockwise; 270 anticlockwise turns it back
    with ws.transaction() as con:  # the pairs table may name the quarter turn either way
        con.execute("UPDATE pairs SET orientation = 1 WHERE image_a = 1 AND image_b = 2")
    r = ReviewWidget(ws, reviewer="ana", verdict="near")
    assert r.session.current.key == (1, 2) and r.session.current.orientation == 1
    assert "turned 270° anticlockwise" in r.pair_info.value
