"""A build runs BLAS on one thread and leaves the caller's setting as it found it (threadpoolctl's report)."""
from threadpoolctl import threadpool_info, threadpool_limits

from agegrid import pipeline
from agegrid.config import load_build_file
from tests.helpers import basin_build


def _blas_threads() -> list[int]:
    return [lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"]


def test_a_build_runs_blas_on_one_thread_and_restores_the_callers_setting(tmp_path, monkeypatch):
    seen = []
    read_inputs = pipeline.read_inputs

    def reading(config):  # a probe at the build's first stage
        seen.extend(_blas_threads())
        return read_inputs(config)

    monkeypatch.setattr(pipeline, "read_inputs", reading)
    config = load_build_file(basin_build(tmp_path, spacing=0.5, chunk=64))
    with threadpool_limits(limits=2, user_api="blas"):  # the caller's setting, whatever the machine's cores
        assert set(_blas_threads()) == {2}
        pipeline.build(config, force=True, progress=False)
        assert set(_blas_threads()) == {2}
    assert seen and set(seen) == {1}
