"""The PSA outer loop: evaluate the model once per parameter draw, resumably.

Determinism: each draw's results depend only on (draw, values) and are always read back
from their own file, then concatenated in draw order. So the final table is the same
whatever the backend, the number of workers, the order in which draws finish, or how
many times the run was interrupted and resumed.
"""
from __future__ import annotations

from contextlib import closing
from pathlib import Path

import pandas as pd
from microsim.progress import progress as progress_bar

from . import folder
from .backends import Evaluate, choose


def _jobs(draws: pd.DataFrame) -> list[tuple[int, dict[str, float]]]:
    if "draw" not in draws.columns or not draws["draw"].is_unique or len(draws) == 0:
        raise ValueError("draws must be a non-empty table with a unique `draw` column")
    names = [c for c in draws.columns if c != "draw"]
    return [(int(row[0]), {n: float(v) for n, v in zip(names, row[1:])})
            for row in draws[["draw", *names]].itertuples(index=False)]


def run_draws(evaluate: Evaluate, draws: pd.DataFrame, run_dir: Path, *, workers: int = 1,
              backend: str = "processes", address: str | None = None, progress: bool = True,
              fingerprint: dict) -> pd.DataFrame:
    """Evaluate every draw not yet on disk and return all draws' results in draw order.

    evaluate(draw, values) gives a tidy table for one draw (a `draw` column is put first);
    it must be picklable (a module-level function, or functools.partial of one) for the
    process and dask backends. backend "processes" runs in this process when workers == 1,
    else in a pool of `workers` processes; "dask" uses the scheduler at `address`, or a
    local cluster of `workers` processes. `fingerprint` (JSON-able: scenario hash, seed,
    patients per draw, number of draws, version...) is stored in psa.json; a folder
    holding another run's psa.json is refused, the same run's is resumed. On Ctrl-C (or any
    failure) the finished draws stay on disk, the workers are shut down and the exception is
    re-raised; a folder this call created is removed again if no draw had finished.
    """
    run = choose(backend, workers, address)
    jobs = _jobs(draws)
    run_dir = Path(run_dir)
    created = folder.claim(run_dir, fingerprint, draws)
    pending = [job for job in jobs if not folder.draw_path(run_dir, job[0]).exists()]
    with progress_bar(len(jobs), "PSA draws", "draw", shown=progress,
                      initial=len(jobs) - len(pending)) as bar:
        if pending:
            try:
                with closing(run(evaluate, pending)) as finished:
                    for draw, results in finished:
                        folder.write_table(results, folder.draw_path(run_dir, draw))
                        bar.update()
            except BaseException:
                folder.release(run_dir, created)  # a new folder without a finished draw goes
                raise
    table = folder.read_draws(run_dir, (draw for draw, _ in jobs))
    folder.write_table(table, run_dir / folder.RESULTS)
    return table
