"""The one progress bar of a run and its studies (tqdm, cleared when done)."""

from __future__ import annotations


def bar(total: int | None, desc: str, enabled: bool):
    """A row counter on stderr; off when not enabled or when there is nothing to count."""
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit="row", disable=not enabled or total == 0, leave=False)
