"""Library calls leave the caller's global state alone: the matplotlib backend (a notebook
user keeps theirs), pyplot's open figures, OpenCV's thread count and the warnings filters
are the same after preview, audit, score and generate as before."""

from __future__ import annotations

import warnings

import cv2
import matplotlib
import pandas as pd
import pytest

from augsplit import api
from augsplit.audit.entry import audit_dataset
from augsplit.preview import preview
from augsplit.threads import opencv_threads


def _state():
    import matplotlib.pyplot as plt

    return (matplotlib.get_backend(), len(plt.get_fignums()), cv2.getNumThreads(), list(warnings.filters),
            matplotlib.rcParams["backend"])


@pytest.fixture
def caller_state():
    """A caller with a non-Agg backend, 3 OpenCV threads and a filter of their own."""
    old_backend, old_threads = matplotlib.get_backend(), cv2.getNumThreads()
    matplotlib.use("svg", force=True)  # any backend but Agg: the one preview used to force
    cv2.setNumThreads(3)
    with warnings.catch_warnings():
        warnings.simplefilter("error", category=ResourceWarning)
        yield
    cv2.setNumThreads(old_threads)
    matplotlib.use(old_backend, force=True)


def test_library_calls_restore_global_state(tmp_path, caller_state):
    before = _state()
    assert before[0] == "svg" and before[2] == 3
    out = tmp_path / "ds"
    api.generate_dataset("demo", out, store="none", progress=False, overwrite=False)
    assert _state() == before
    preview(out, tmp_path / "preview", per_split=2)
    assert _state() == before
    audit_dataset(out)
    assert _state() == before
    rows = pd.read_parquet(out / "manifest")
    preds = pd.DataFrame({"image_id": rows["image_id"], "predicted": rows["class_name"]})
    result = api.score_predictions(out, preds)
    assert _state() == before
    from augsplit.score import write_outputs

    write_outputs([("model", result)], tmp_path / "score")  # the plots, made without pyplot
    assert _state() == before
    assert (tmp_path / "preview").is_dir() and any((tmp_path / "score").iterdir())


def test_opencv_threads_restores_even_on_error():
    cv2.setNumThreads(2)
    with pytest.raises(RuntimeError):
        with opencv_threads(1):
            assert cv2.getNumThreads() == 1
            raise RuntimeError("boom")
    assert cv2.getNumThreads() == 2


def _count_render_threads(monkeypatch) -> list[int]:
    from augsplit import scene

    seen, real = [], scene.render

    def recording(*a, **k):
        seen.append(cv2.getNumThreads())
        return real(*a, **k)

    monkeypatch.setattr(scene, "render", recording)
    return seen


def test_preview_renders_on_one_opencv_thread_and_loaders_leave_the_callers_count(tmp_path, caller_state,
                                                                                  monkeypatch):
    """preview (a command) does its image work on one OpenCV thread, as generate, verify and the
    audit's workers, and restores the caller's count; lazy Dataset reads and OnlineSampler
    items in the caller's own process leave its count as it is (switching per item costs more
    than the item)."""
    from augsplit.data import Dataset, OnlineSampler
    from augsplit.spec import builtin_spec_path

    out = tmp_path / "ds"
    api.generate_dataset("demo", out, store="none", progress=False, overwrite=False)
    seen = _count_render_threads(monkeypatch)
    Dataset(out, "train")[0]
    OnlineSampler(str(builtin_spec_path("demo")), "train", length=2)[1]
    assert seen == [3, 3]
    preview(out, tmp_path / "preview", per_split=1)
    assert len(seen) >= 3 and set(seen[2:]) == {1}
    assert cv2.getNumThreads() == 3


def _item_in_worker(root, queue):
    from augsplit.data import Dataset, OnlineSampler
    from augsplit.spec import builtin_spec_path

    Dataset(root, "train")[0]
    OnlineSampler(str(builtin_spec_path("demo")), "train", length=2)[1]
    queue.put(cv2.getNumThreads())


@pytest.mark.parametrize("method", ["fork", "spawn"])
def test_loader_workers_run_on_one_opencv_thread_and_a_fork_never_hangs(tmp_path, caller_state, method):
    """A loader's worker process (started by multiprocessing, as DataLoader workers are) reads
    items on one OpenCV thread. With fork, the parent's pool has live threads when it forks:
    before threads.py parked it across the fork, the child's first cv2.setNumThreads waited
    forever for threads that do not exist in it (a DataLoader test hung)."""
    import multiprocessing as mp

    import numpy as np

    out = tmp_path / "ds"
    api.generate_dataset("demo", out, store="none", progress=False, overwrite=False)
    big = np.random.default_rng(0).random((1500, 1500), dtype=np.float32)
    cv2.GaussianBlur(big, (31, 31), 5)  # OpenCV's pool now has live threads in this process
    ctx = mp.get_context(method)
    queue = ctx.Queue()
    child = ctx.Process(target=_item_in_worker, args=(str(out), queue))
    child.start()
    child.join(timeout=120)
    if child.is_alive():
        child.kill()
        pytest.fail(f"the {method} worker hung")
    assert child.exitcode == 0 and queue.get(timeout=5) == 1
    assert cv2.getNumThreads() == 3  # the parent keeps its count across the fork
