"""EdgeTraces built directly from synthetic edge positions (no image), for the statistics."""
import numpy as np

from edges._types import EdgeTraces


def make_traces(left_nm, right_nm, sigma_left_nm, sigma_right_nm, *, row_spacing_nm=1.0, source="synthetic"):
    """Interleave lines' left and right edges as the edge fit does; per-row sigmas given."""
    n_lines, n_rows = left_nm.shape
    pos = np.empty((2 * n_lines, n_rows))
    sig = np.empty_like(pos)
    pos[0::2], pos[1::2] = left_nm, right_nm
    sig[0::2], sig[1::2] = np.broadcast_to(sigma_left_nm, left_nm.shape), np.broadcast_to(sigma_right_nm, right_nm.shape)
    n_e = 2 * n_lines
    return EdgeTraces(position_nm=pos, sigma_nm=sig, valid=np.ones(pos.shape, bool),
                      reason=np.zeros(pos.shape, np.int8), line_index=np.repeat(np.arange(n_lines), 2),
                      side=np.tile(["left", "right"], n_lines), row_spacing_nm=row_spacing_nm,
                      reduced_chi2=np.ones(pos.shape), iterations=np.ones(pos.shape, np.int64),
                      contrast_to_noise=np.full(n_e, 10.0), edge_flags=np.array([""] * n_e),
                      detector="synthetic", source=source)
