"""Solves split across MPI ranks (``mpiexec -n P relaxtui solve CASE.toml``).

The picture is cut into P strips of whole rows, balanced by unknown count;
each rank sweeps its strip plus one halo row above and below, and the ranks
exchange their edge rows after every sweep (after every colour for red-black
SOR). Rank 0 loads and checks the case, assembles it once, sends every rank
its strip of the class array, runs the unchanged driver and stopping rule on
the global quantities (largest update, residual, flows: reduced once per
chunk), and writes the outputs.

This module only looks at the environment: :func:`launched_ranks` tells
whether the process was started by an MPI launcher with more than one rank,
without importing mpi4py. Nothing else in relaxtui imports mpi4py.
"""

from __future__ import annotations

import os

# Variables an MPI launcher sets in every rank's environment, holding the job's size:
# MPICH's Hydra and Intel MPI (PMI_SIZE), Open MPI (OMPI_COMM_WORLD_SIZE), PMIx
# launchers such as Slurm's srun --mpi=pmix (PMIX_SIZE is not standard; Slurm also sets
# SLURM_NTASKS, which does not prove an MPI launch and is not read).
SIZE_VARIABLES = ("PMI_SIZE", "OMPI_COMM_WORLD_SIZE", "MPI_LOCALNRANKS", "PMIX_SIZE")
# Variables whose mere presence says "started by an MPI launcher" (size unknown from them).
LAUNCH_VARIABLES = ("PMI_RANK", "PMIX_RANK", "OMPI_COMM_WORLD_RANK", "HYDRA_CONTROL_FD", "PMI_FD")


def launched_ranks(environ=None) -> int:
    """Ranks of the MPI job this process belongs to: 0 when not started by an MPI launcher.

    A launch whose size cannot be read from the environment counts as 2 (the
    MPI path then asks mpi4py for the real size and, for one rank, runs the
    ordinary single-process solve).
    """
    env = os.environ if environ is None else environ
    for name in SIZE_VARIABLES:
        text = env.get(name)
        if text:
            try:
                size = int(text)
            except ValueError:
                continue
            if name == "MPI_LOCALNRANKS":  # ranks on this host only: at least that many in the job
                if size > 1:
                    return size
                continue
            return max(size, 0)
    if any(env.get(name) for name in LAUNCH_VARIABLES):
        return 2
    return 0
