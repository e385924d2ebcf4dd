"""Envelope campaign: a dispersed Monte Carlo run of a generated solver.

A campaign draws N cases from a dispersion file (:mod:`codegen.verify.dispersions`),
solves every case with the generated solver and, on every M-th case and on
every case whose status or iteration count stands out, with the reference too.
Each finished case is one JSON line appended to ``RUN_DIR/results.jsonl``
(one ``write`` + flush + fsync per record), beside ``RUN_DIR/manifest.json``
that fixes what the run is. Running the same command again resumes: cases
already recorded are not solved again, a torn last line (a kill mid-write) is
dropped and that case is solved again.

Everything in a record but the measured times (:data:`MEASURED_KEYS`) is a
function of (solver tree, dispersions, seed, case index, reference-every,
stand-out threshold) alone: workers open the solvers themselves from the tree
(compiled solvers do not pickle), and case inputs come from (seed, index).
So the local process pool, a Dask cluster, any worker count and any number of
interruptions give the same records.

The modules, in the order of the data:

- ``solvers``: open the generated solver of a tree (or a dry run) and the reference;
- ``cases``: one case, solved, as a record;
- ``engines``: :func:`run_local` (a process pool; ``workers == 1`` runs in this
  process) and :func:`run_dask` (a ``distributed`` scheduler at an address);
- ``records``: the run's files (manifest, results log, replay lines);
- ``run``: a run's manifest (new or resumed) and :func:`run_campaign`;
- ``summary``: summary.json; ``figures`` and ``report``: report.html.
"""
