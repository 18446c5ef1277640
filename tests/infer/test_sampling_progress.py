"""What a running fit reports: PyMC's per-draw callback counted per chain, nutpie's
template parsed. The draws are PyMC's own ``Draw`` records, built by hand."""

import pytest

from bayeslong.infer.progress import PymcCounter, SamplingProgress, parse_nutpie


def test_pymc_draws_are_counted_per_chain_and_divergences_after_warm_up_only():
    from pymc.sampling.parallel import Draw  # the record pm.sample passes to callback=

    seen = []
    counter = PymcCounter(chains=2, per_chain=4, report=seen.append)
    for chain in (0, 1):
        for i in range(4):
            tuning = i < 2
            stats = [{"diverging": i in (1, 3)}]  # one in warm-up, one after, per chain
            counter(trace=None, draw=Draw(chain, i == 3, i, tuning, stats, {}))
    counter.finish()
    # a report when each chain ends (is_last), whatever the time since the last one
    chain_ends = [p for p in seen if p.stage == "sampling" and sum(p.done) in (4, 8)]
    assert [p.done for p in chain_ends][-2:] == [(4, 0), (4, 4)]
    assert seen[-1].stage == "done" and seen[-1].done == (4, 4) and seen[-1].total == (4, 4)
    assert seen[-1].divergences == 2  # the two after warm-up
    assert seen[-1].fraction == 1.0 and seen[-1].seconds_left == 0.0


def test_nutpie_template_rendering_is_parsed_per_chain():
    assert parse_nutpie("0/2000/0;") == ((0,), (2000,), 0)
    assert parse_nutpie("5/10/1;10/10/2;") == ((5, 10), (10, 10), 3)
    assert parse_nutpie("") == ((), (), 0)


@pytest.mark.parametrize("done, elapsed, left", [((0, 0), 5.0, None),  # no rate yet
                                                 ((50, 0), 0.5, None),  # under a second
                                                 ((100, 100), 10.0, 10.0)])  # half in 10 s
def test_time_left_is_the_rate_so_far_extrapolated(done, elapsed, left):
    p = SamplingProgress(stage="sampling", done=done, total=(200, 200), elapsed=elapsed)
    assert p.seconds_left == (None if left is None else pytest.approx(left))
