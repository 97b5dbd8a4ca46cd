/**
 * Type declarations for the parts of jstat 1.9.6 (CommonJS, ships no types) that src/uncertainty uses.
 * Signatures read from node_modules/jstat/dist/jstat.js. `_random_fn` is jstat's current uniform
 * source (undocumented field; `setRandom` assigns it), read here to restore it after a seeded call.
 */
declare module "jstat" {
  interface JStatStatic {
    _random_fn: () => number;
    setRandom(fn: () => number): void;
    randn(): number;
    normal: {
      sample(mean: number, sd: number): number;
      cdf(x: number, mean: number, sd: number): number;
    };
    lognormal: {
      sample(mu: number, sigma: number): number;
      cdf(x: number, mu: number, sigma: number): number;
    };
    uniform: {
      sample(a: number, b: number): number;
      cdf(x: number, a: number, b: number): number;
      inv(p: number, a: number, b: number): number;
    };
    /** jstat's argument order is (min, max, mode). */
    triangular: {
      sample(a: number, b: number, c: number): number;
      cdf(x: number, a: number, b: number, c: number): number;
      inv(p: number, a: number, b: number, c: number): number;
    };
  }
  const pkg: { jStat: JStatStatic };
  export default pkg;
}
