"""Type stubs for the network kernels (see _network.pyx for the design)."""

import numpy as np
from numpy.typing import NDArray

STATUS_OK: int
STATUS_NODE_BUDGET: int
STATUS_ARC_BUDGET: int
STATUS_NO_MEMORY: int

def expand_nuisance_stage(
    comp: NDArray[np.int64], m: int, w: NDArray[np.int64], fixed: bool, c_target: int,
    stratum_end: bool, rem_trials: int, s: NDArray[np.int64], later_lo: NDArray[np.int64],
    later_hi: NDArray[np.int64], rem_lo: NDArray[np.int64], rem_hi: NDArray[np.int64],
    unit_min: NDArray[np.int64], unit_max: NDArray[np.int64], ustride: NDArray[np.int64],
    ulo: NDArray[np.int64], cstride: int, max_nodes: int, max_arcs: int,
) -> tuple: ...
def backward_stage(
    arc_ptr: NDArray[np.int64], arc_succ: NDArray[np.int32], arc_y: NDArray[np.int32],
    log_b_next: NDArray[np.float64], log_binom: NDArray[np.float64],
) -> NDArray[np.float64]: ...
def forward_full_stage(
    cur_node: NDArray[np.int64], cur_v: NDArray[np.int64], cur_logp: NDArray[np.float64],
    arc_ptr: NDArray[np.int64], arc_succ: NDArray[np.int32], arc_y: NDArray[np.int32],
    arc_logp: NDArray[np.float64], z_step: int, v_size: int, max_nodes: int,
) -> tuple: ...
def forward_dense_stage(
    cur_logp: NDArray[np.float64], cur_offset: NDArray[np.int64], cur_vmin: NDArray[np.int64],
    cur_width: NDArray[np.int64], next_offset: NDArray[np.int64], next_vmin: NDArray[np.int64],
    next_stride: NDArray[np.int64], arc_ptr: NDArray[np.int64], arc_succ: NDArray[np.int32],
    arc_y: NDArray[np.int32], arc_logp: NDArray[np.float64], z: NDArray[np.int64],
) -> NDArray[np.float64]: ...
def minmax_stage(
    cur_min: NDArray[np.int64], cur_max: NDArray[np.int64], arc_ptr: NDArray[np.int64],
    arc_succ: NDArray[np.int32], arc_y: NDArray[np.int32], z: NDArray[np.int64], n_next: int,
) -> tuple[NDArray[np.int64], NDArray[np.int64]]: ...
