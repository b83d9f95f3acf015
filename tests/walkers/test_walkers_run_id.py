"""All walkers of one job share one run id (walker 0's), kept by save/load and restore."""

from test_walkers_threads import make_bias, results, run_walkers

from gridbias.walkers import share


def test_walkers_share_walker_0s_run_id_and_keep_it(tmp_path):
    def walker(comm):
        own = make_bias()
        bias = share(own, comm, abort_on_error=False)
        bias.deposit([0.1 * comm.Get_rank(), 0.0], time=1.0)
        bias.save(tmp_path / "shared.gbz")
        again = type(bias).load(tmp_path / "shared.gbz", comm, abort_on_error=False)
        restored = bias.restored(*bias.to_state())
        return own.run_id, bias.run_id, again.run_id, restored.run_id

    ids = results(run_walkers(3, walker))
    assert len({own for own, *_ in ids}) == 3  # each walker made its own bias, with its own id
    assert {r for _, *kept in ids for r in kept} == {ids[0][0]}  # shared: walker 0's, kept by save/load/restore
