/**
 * The balance of a stock from its inflow and outflow, per series (row-major n × T arrays):
 *   stock(t) = stock(t − 1) + inflow(t) − outflow(t), stock(−1) = stock0 (0 without),
 *   stock change(t) = stock(t) − stock(t − 1).
 * With initOut (the initial stock's outflow), it is first added to the outflow, in place.
 */
export function balanceFromOutflow(inflow: Float64Array, outflow: Float64Array, initOut: Float64Array | null, stock0: Float64Array | null,
  n: number, T: number, stock: Float64Array, stockChange: Float64Array): void {
  for (let s = 0; s < n; s++) {
    let prev = stock0 ? stock0[s]! : 0;
    for (let i = s * T; i < s * T + T; i++) {
      if (initOut) outflow[i] += initOut[i]!;
      const v = prev + inflow[i]! - outflow[i]!;
      stock[i] = v;
      stockChange[i] = v - prev;
      prev = v;
    }
  }
}
