"""Compiled readers of a finished trace (source text compiled inside the kernel module).

Like ``sim/_stepper_body.py``, this file is not imported on its own: :mod:`sim.kernel`
appends it to the generated module, after the stepper, so it can call every kind's
stamp through ``tables`` and ``evaluate_parts``. See DEVELOPERS.md, "Why a generated
kernel".
"""


@numba.njit(cache=True, nogil=True)
def gate_currents(values, first, vdd_col, in_cols, out_cols, pf, nf, tab, df):
    """Current (A) out of each gate's output into its net, sourcing positive, at the
    recorded points ``values[first:]``; shape (m, g).

    values: (K, r) recorded volts; vdd_col: the column of vdd; in_cols, out_cols: (g,)
    the columns of each gate's input and output net (-1 for gnd, 0 V). pf, nf, tab, df
    describe the gates alone on the unknowns (gnd, vdd, then in and out of each gate),
    as ``sim.render.gate_output_amps`` lays them out. One call for the whole trace: it
    runs without the GIL beside the rest of a render, where a Python loop over batches
    would wait for the GIL at every batch.
    """
    gates = in_cols.shape[0]
    size = 2 + 2 * gates
    P, N, D = tables(pf, nf, tab, df)
    x = np.zeros(size)
    f = np.zeros(size)
    G = np.zeros((size, size))
    count = max(values.shape[0] - first, 0)
    out = np.empty((count, gates))
    for s in range(count):
        row = first + s
        x[1] = values[row, vdd_col]
        for j in range(gates):
            x[2 + 2 * j] = values[row, in_cols[j]] if in_cols[j] >= 0 else 0.0
            x[3 + 2 * j] = values[row, out_cols[j]] if out_cols[j] >= 0 else 0.0
        evaluate_parts(x, 0.0, P, N, D, f, G)
        for j in range(gates):
            out[s, j] = -f[3 + 2 * j]  # f is the current flowing into the gate at out
    return out
