"""The pinned-version cache on its own: least recently used first out, bounded by bytes, loads once.

Reference: the README's "Memory each setting allows" (``RBFGATE_SERVE_PINNED_CACHE_BYTES``: a version
larger than the budget is loaded for each request and never kept) and the usual LRU rule (common
practice: a hit makes an entry the most recent). The loaded versions here are stand-ins that only
carry ``bundle.resident_bytes``, the one attribute the cache reads.
"""

from __future__ import annotations

from types import SimpleNamespace

from service.pinned_versions import PinnedVersions


def _loader(sizes: dict[str, int], calls: list[tuple[str, str]]):
    def load(name: str, version: str):
        calls.append((name, version))
        return SimpleNamespace(name=name, version=version, bundle=SimpleNamespace(resident_bytes=sizes[version]))
    return load


def test_a_cached_version_is_not_loaded_again():
    calls: list[tuple[str, str]] = []
    cache = PinnedVersions(100)
    load = _loader({"1": 40}, calls)
    first = cache.get("iris", "1", load)
    assert cache.get("iris", "1", load) is first
    assert calls == [("iris", "1")]


def test_the_least_recently_used_version_leaves_first_when_the_budget_is_passed():
    calls: list[tuple[str, str]] = []
    cache = PinnedVersions(100)
    load = _loader({"1": 40, "2": 40, "3": 40}, calls)
    cache.get("iris", "1", load)
    cache.get("iris", "2", load)
    cache.get("iris", "1", load)  # 1 is now more recent than 2
    cache.get("iris", "3", load)  # 120 bytes > 100: the least recent, 2, goes
    assert cache.size() == (2, 80)
    cache.get("iris", "1", load)
    cache.get("iris", "2", load)
    assert calls == [("iris", "1"), ("iris", "2"), ("iris", "3"), ("iris", "2")]


def test_a_version_larger_than_the_budget_is_served_but_never_kept():
    calls: list[tuple[str, str]] = []
    cache = PinnedVersions(100)
    load = _loader({"small": 60, "huge": 101}, calls)
    cache.get("iris", "small", load)
    assert cache.get("iris", "huge", load).version == "huge"
    assert cache.size() == (1, 60)  # the small one was not evicted for it
    cache.get("iris", "huge", load)
    assert calls.count(("iris", "huge")) == 2


def test_a_zero_budget_keeps_nothing():
    calls: list[tuple[str, str]] = []
    cache = PinnedVersions(0)
    load = _loader({"1": 1}, calls)
    cache.get("iris", "1", load)
    cache.get("iris", "1", load)
    assert cache.size() == (0, 0) and len(calls) == 2
