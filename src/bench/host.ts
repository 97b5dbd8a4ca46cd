/**
 * The host a bench ran on, printed in its JSON (`host`) so that figures from different machines
 * are never compared by mistake: CPU model, cores, cache sizes, memory, the kernels' instruction
 * set, and the Node, DuckDB and operating-system versions.
 */
import { readFileSync } from "node:fs";
import { availableParallelism, cpus, totalmem, release, platform, arch } from "node:os";
import { spawnSync } from "node:child_process";
import { Session } from "../engine/session.js";
import { nativeKernels } from "../cohort/native.js";

export interface HostInfo {
  cpu_model: string;
  cores: number;
  /** Cache sizes in bytes as the system reports them (getconf; 0 when unknown). */
  l1d_cache_bytes: number;
  l2_cache_bytes: number;
  l3_cache_bytes: number;
  memory_bytes: number;
  kernels_isa: string;
  /** Whether the CPU runs under a hypervisor (/proc/cpuinfo's "hypervisor" flag). */
  virtual_machine: boolean;
  node: string;
  duckdb: string;
  os: string;
}

function getconf(name: string): number {
  const r = spawnSync("getconf", [name], { encoding: "utf8" });
  const v = Number(r.stdout?.trim());
  return r.status === 0 && Number.isFinite(v) && v > 0 ? v : 0;
}

function cpuinfo(): { model: string; flags: string } {
  try {
    const text = readFileSync("/proc/cpuinfo", "utf8");
    return { model: /^model name\s*:\s*(.*)$/m.exec(text)?.[1]?.trim() ?? "", flags: /^flags\s*:\s*(.*)$/m.exec(text)?.[1] ?? "" };
  } catch {
    return { model: "", flags: "" };
  }
}

export async function hostInfo(): Promise<HostInfo> {
  const ci = cpuinfo();
  const k = nativeKernels()?.info();
  const s = await Session.open();
  let duckdb = "";
  try {
    const [row] = await s.all("SELECT version() AS v");
    duckdb = String(row?.v ?? "");
  } finally {
    s.close();
  }
  return {
    cpu_model: ci.model || cpus()[0]?.model || "unknown",
    cores: availableParallelism(),
    l1d_cache_bytes: k?.l1d || getconf("LEVEL1_DCACHE_SIZE"),
    l2_cache_bytes: k?.l2 || getconf("LEVEL2_CACHE_SIZE"),
    l3_cache_bytes: k?.l3 || getconf("LEVEL3_CACHE_SIZE"),
    memory_bytes: totalmem(),
    kernels_isa: k?.isa ?? "none (WebAssembly or TypeScript kernels)",
    virtual_machine: /\bhypervisor\b/.test(ci.flags),
    node: process.version,
    duckdb,
    os: `${platform()} ${release()} ${arch()}`,
  };
}

/** One line for the printed table. */
export function hostLine(h: HostInfo): string {
  const kb = (b: number) => (b >= 1 << 20 ? `${(b / (1 << 20)).toFixed(b % (1 << 20) ? 1 : 0)} MiB` : `${Math.round(b / 1024)} KiB`);
  return `host: ${h.cpu_model}, ${h.cores} cores${h.virtual_machine ? " (virtual machine)" : ""}, L1d ${kb(h.l1d_cache_bytes)}, L2 ${kb(h.l2_cache_bytes)}, L3 ${kb(h.l3_cache_bytes)}, ` +
    `${(h.memory_bytes / 2 ** 30).toFixed(0)} GiB, kernels ${h.kernels_isa}, Node ${h.node}, DuckDB ${h.duckdb}, ${h.os}`;
}
