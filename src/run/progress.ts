/** Progress on stderr: shown on a terminal, silent otherwise or with --quiet. */
export class Progress {
  private readonly t0 = Date.now();
  private readonly lines: string[] = [];
  constructor(readonly enabled: boolean) {}

  /** Every message so far, each with its UTC time (run.log). */
  log(): string {
    return this.lines.join("\n");
  }

  static forTerminal(quiet: boolean): Progress {
    return new Progress(!quiet && Boolean(process.stderr.isTTY));
  }

  info(msg: string): void {
    this.lines.push(`${new Date().toISOString()} ${msg}`);
    if (this.enabled) process.stderr.write(`[${((Date.now() - this.t0) / 1000).toFixed(1)}s] ${msg}\n`);
  }

  /** A counter for long loops; prints at most about twice a second. */
  counter(label: string, total: number): (done: number) => void {
    let last = 0;
    return (done: number) => {
      if (!this.enabled) return;
      const now = Date.now();
      if (now - last < 500 && done < total) return;
      last = now;
      const line = `${label}: ${done}/${total} (${((100 * done) / Math.max(total, 1)).toFixed(0)} %)`;
      // On a terminal the counter rewrites its line; elsewhere each report is a line of its own.
      process.stderr.write(process.stderr.isTTY ? `\r${line}${done >= total ? "\n" : ""}` : `${line}\n`);
    };
  }
}
