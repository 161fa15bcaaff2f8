"""kd-tree traversal kernels (placeholder until the kd-tree lands: reports a miss)."""
import numba
import numpy as np


@numba.njit(cache=True, error_model="numpy")
def kd_closest_hit(tree, stack_i, stack_f, ray, t_max):
    return t_max, -1, np.float32(0.0), np.float32(0.0), 0, 0


@numba.njit(cache=True, error_model="numpy")
def kd_any_hit(tree, stack_i, stack_f, ray, t_max):
    return False, 0, 0
