"""Progress bars, one way for every command and loader: `tqdm.auto`, which shows a widget in a
Jupyter notebook and a text bar in a terminal."""

from __future__ import annotations


def bar(iterable=None, **kwargs):
    """A tqdm.auto progress bar (same arguments as tqdm)."""
    from tqdm.auto import tqdm

    return tqdm(iterable, **kwargs)
