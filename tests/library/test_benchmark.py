"""benchmark_query (for `make bench`) runs and reports; no wall-clock time is asserted (team rule)."""

from __future__ import annotations

from benchkit.library import benchmark_query


def test_benchmark_query_small(tmp_path):
    out = benchmark_query(400, folder=tmp_path)
    assert out["n_curves"] == 400 and out["n_parts"] == 20 and out["backends"] == ["sqlite"]
    assert out["covered_parts"] == 20  # every synthetic part has curves at 85 degC reaching 5 V
    for key in ("build_s", "query_cold_s", "query_warm_s"):
        assert out["sqlite"][key] > 0
    assert out["loop_over_query"] == out["loop_s"] / out["sqlite"]["query_warm_s"]
    assert list(tmp_path.iterdir()) == []  # the temporary library is gone


def test_benchmark_query_on_both_backends(tmp_path, postgres_url):
    out = benchmark_query(200, folder=tmp_path, postgres_url=postgres_url, loop=False)
    assert out["backends"] == ["sqlite", "postgresql"] and out["same_answer_on_both"]
    assert out["postgresql"]["covered_parts"] == out["sqlite"]["covered_parts"] == 10


def test_the_benchmarks_own_documents_are_out_of_the_collectors_way_while_it_times(tmp_path, monkeypatch):
    # A full collection of the ~8 objects per synthetic document, falling inside a timed cold
    # query, was measured at about 0.4 s for 100,000 curves: the documents are frozen
    # (Python's gc.freeze, gc module documentation: frozen objects are left out of every
    # collection) while queries are timed, and the collector is left as it was found.
    import gc

    from benchkit.library.store import Library

    frozen = []
    query = Library.query

    def spy(self, *args, **kwargs):
        frozen.append(gc.get_freeze_count())
        return query(self, *args, **kwargs)

    monkeypatch.setattr(Library, "query", spy)
    before = gc.get_freeze_count()
    benchmark_query(100, folder=tmp_path, loop=False)
    assert len(frozen) == 12  # 3 fresh opens, each a cold query and 3 warm ones
    assert min(frozen) > before
    assert gc.get_freeze_count() == before


def test_objects_a_caller_froze_stay_frozen(tmp_path):
    # gc.unfreeze releases every frozen object (Python gc module documentation), so the
    # benchmark must not call it over a caller's own frozen objects.
    import gc

    assert gc.get_freeze_count() == 0
    keep = [[i] for i in range(1000)]
    gc.freeze()
    try:
        benchmark_query(100, folder=tmp_path, loop=False)
        # the caller's 1000 lists and their list are still frozen (an unfreeze makes it 0);
        # frozen temporaries freed by reference counting meanwhile lower the count a little
        assert gc.get_freeze_count() > len(keep)
    finally:
        gc.unfreeze()
    del keep
