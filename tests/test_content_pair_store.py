"""Scored content pairs kept by content: read back only when nothing they depend on changed."""

import numpy as np
import pandas as pd
import pytest

import curate.content_pair_store as store
from curate.near_duplicates import score_content_pairs, score_pairs
from curate.store import Workspace
from test_near_duplicates import _clustered_hash_frame

KEY = ["image_a", "image_b"]


@pytest.fixture()
def frames():
    return _clustered_hash_frame(4, windows_of_phash=True)


def _same(a: pd.DataFrame, b: pd.DataFrame) -> None:
    pd.testing.assert_frame_equal(a.sort_values(KEY).reset_index(drop=True),
                                  b.sort_values(KEY).reset_index(drop=True), check_dtype=False)


def test_read_back_pairs_equal_computed_ones(frames, tmp_path, monkeypatch):
    catalog, hashes = frames
    ws = Workspace.create(tmp_path / "ws")
    first = store.score_pairs_kept(catalog, hashes, cache=ws)
    assert first.attrs["pairs_read_back"] is False and len(first) > 50
    # the second time nothing is computed: a computation would fail
    monkeypatch.setattr(store, "score_content_pairs", lambda *a, **k: pytest.fail("computed again"))
    second = store.score_pairs_kept(catalog, hashes, cache=ws)
    assert second.attrs["pairs_read_back"] is True
    _same(first, second)
    _same(first, score_pairs(catalog, hashes))  # and both equal the plain computation


def test_the_answer_does_not_depend_on_the_order_of_the_contents(frames):
    _, hashes = frames
    shuffled = hashes.sample(frac=1.0, random_state=1)
    a, b = score_content_pairs(hashes), score_content_pairs(shuffled)
    pd.testing.assert_frame_equal(a.sort_values(["sha_p", "sha_q"]).reset_index(drop=True),
                                  b.sort_values(["sha_p", "sha_q"]).reset_index(drop=True))


@pytest.mark.parametrize("change", ["code", "crop_window", "content", "radius"])
def test_any_change_asks_again(frames, tmp_path, change):
    catalog, hashes = frames
    ws = Workspace.create(tmp_path / "ws")
    store.cached_content_pairs(ws, hashes)
    radius = 8
    hashes = hashes.copy()
    if change == "code":
        hashes.loc[3, "dhash"] = np.uint64(int(hashes.loc[3, "dhash"]) ^ 1)
    elif change == "crop_window":
        windows = hashes.at[5, "crop_hashes"].copy()
        windows[0] ^= np.uint64(1)
        hashes.at[5, "crop_hashes"] = windows
    elif change == "content":
        hashes = hashes.iloc[1:]
    else:
        radius = 6
    again = store.cached_content_pairs(ws, hashes, radius=radius)
    assert again.attrs["read_back"] is False
    pd.testing.assert_frame_equal(again, score_content_pairs(hashes, radius=radius))


def test_a_damaged_answer_is_computed_again_and_old_answers_are_dropped(frames, tmp_path):
    catalog, hashes = frames
    ws = Workspace.create(tmp_path / "ws")
    store.cached_content_pairs(ws, hashes)
    (path,) = (ws.path / store.FOLDER).glob("*.parquet")
    path.write_bytes(b"not parquet")
    again = store.cached_content_pairs(ws, hashes)
    assert again.attrs["read_back"] is False
    assert store.cached_content_pairs(ws, hashes).attrs["read_back"] is True
    for k in range(store.KEEP_FILES + 2):
        store.cached_content_pairs(ws, hashes.iloc[k + 1:])
    assert len(list((ws.path / store.FOLDER).glob("*.parquet"))) == store.KEEP_FILES
