"""numpy's huge-page advice during an audit (steelyard.page_advice).

Source for the setting: numpy's "Global state" reference page (``NUMPY_MADVISE_HUGEPAGE``,
read at import; ``numpy._core.multiarray._get/_set_madvise_hugepage`` are the getter and
setter numpy itself uses behind it).
"""

from __future__ import annotations

import threading
from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import save_file

from steelyard.api import audit
from steelyard.page_advice import small_pages

multiarray = pytest.importorskip("numpy._core.multiarray")
get_advice = multiarray._get_madvise_hugepage
set_advice = multiarray._set_madvise_hugepage


@pytest.fixture(autouse=True)
def _advice_on(monkeypatch: pytest.MonkeyPatch) -> object:
    monkeypatch.delenv("NUMPY_MADVISE_HUGEPAGE", raising=False)
    before = set_advice(True)
    yield
    set_advice(before)


def test_off_inside_and_restored_after() -> None:
    with small_pages():
        assert get_advice() is False
    assert get_advice() is True


def test_restores_a_user_value_of_off() -> None:
    set_advice(False)
    with small_pages():
        assert get_advice() is False
    assert get_advice() is False


def test_restored_when_the_block_raises() -> None:
    with pytest.raises(RuntimeError), small_pages():
        raise RuntimeError("boom")
    assert get_advice() is True


def test_the_users_environment_setting_stands(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("NUMPY_MADVISE_HUGEPAGE", "1")
    with small_pages():
        assert get_advice() is True


def test_overlapping_blocks_restore_once_the_last_ends() -> None:
    inside = threading.Event()
    release = threading.Event()
    seen: list[bool] = []

    def other() -> None:
        with small_pages():
            inside.set()
            release.wait(10)
            seen.append(get_advice())

    thread = threading.Thread(target=other)
    with small_pages():
        thread.start()
        assert inside.wait(10)
    # The first block ended while the other thread's is still open: advice stays off.
    assert get_advice() is False
    release.set()
    thread.join(10)
    assert seen == [False]
    assert get_advice() is True


def test_an_audit_leaves_the_setting_as_it_found_it(tmp_path: Path) -> None:
    rng = np.random.default_rng(0)
    path = tmp_path / "model.safetensors"
    save_file({"fc.weight": rng.standard_normal((64, 32)).astype(np.float32)}, str(path))
    report = audit(path, jobs=2)
    assert report.audits[0].checkpoint["sha256"]
    assert get_advice() is True
