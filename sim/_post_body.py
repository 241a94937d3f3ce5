"""Compiled readers of a finished trace (source text compiled inside the kernel module).

Like ``sim/_stepper_body.py``, this file is not imported on its own: :mod:`sim.kernel`
appends it to the generated module, after the stepper. See DEVELOPERS.md, "Why a
generated kernel".
"""

from blocks.inverter import out_node_amps as _gate_out_node_amps

# compiled into the loop below, not called: a call passes the parameter rows as pointer,
# shape and strides at every gate and point (measured: the loop 1.2 times as fast)
_gate_out_node_amps = numba.njit(inline="always", fastmath=FASTMATH)(_gate_out_node_amps.py_func)


@numba.njit(cache=True, nogil=True, fastmath=FASTMATH)
def gate_currents(values, first, vdd_col, in_cols, out_cols, rows):
    """Current (A) out of each gate's output into its net, sourcing positive, at the
    recorded points ``values[first:]``; shape (m, g).

    values: (K, r) recorded volts; vdd_col: the column of vdd; in_cols, out_cols: (g,)
    the columns of each gate's input and output net (-1 for gnd, 0 V); rows: (g, cols)
    the gates' parameter rows, gnd at 0 V. The output node's term of the gates' stamp
    (``blocks.inverter.out_node_amps``: no Jacobian, no input clamps), to the bit the
    ``-f[out]`` of evaluating the gates alone. One call for a whole trace (or a long
    stretch of one): it runs without the GIL beside the rest of a render, where a
    Python loop over batches would wait for the GIL at every batch.
    """
    gates = in_cols.shape[0]
    count = max(values.shape[0] - first, 0)
    out = np.empty((count, gates))
    for s in range(count):
        row = first + s
        vdd = values[row, vdd_col]
        for j in range(gates):
            vin = values[row, in_cols[j]] if in_cols[j] >= 0 else 0.0
            vout = values[row, out_cols[j]] if out_cols[j] >= 0 else 0.0
            out[s, j] = -_gate_out_node_amps(rows, j, vin, vout, vdd, 0.0)
    return out
