/**
 * The built-in demo: an invented scenario (five invented regions, invented figures).
 * Deterministic: `node dist/data/demo.js DIR` rewrites the same files byte for byte.
 */
import { mkdirSync, writeFileSync } from "node:fs";
import path from "node:path";
import { mulberry32 } from "./prng.js";
import { makeLifetime } from "../cohort/lifetime-spec.js";
import { sigmaAt } from "../cohort/discretise.js";

export const REGIONS = ["ALD", "BRV", "COR", "DUN", "EST"] as const; // Aldmark, Brenvale, Corrinth, Dunmoor, Estrava
const REGION_NAMES: Record<string, string> = { ALD: "Aldmark", BRV: "Brenvale", COR: "Corrinth", DUN: "Dunmoor", EST: "Estrava" };
export const FIRST_YEAR = 1990;
export const LAST_YEAR = 2023;

interface Commodity {
  code: string;
  label: string;
  unit: "piece" | "t" | "kt";
  /** base production per region (in the unit), 1990 */
  base: Record<string, number>;
  growth: number;
  tradeShare: number;
}

const COMMODITIES: Commodity[] = [
  { code: "C100", label: "passenger vehicles", unit: "piece", base: { ALD: 120000, BRV: 40000, COR: 0, DUN: 15000, EST: 5000 }, growth: 0.025, tradeShare: 0.35 },
  { code: "C200", label: "structural steel sections", unit: "kt", base: { ALD: 800, BRV: 450, COR: 300, DUN: 120, EST: 60 }, growth: 0.02, tradeShare: 0.2 },
  { code: "C210", label: "cement", unit: "kt", base: { ALD: 2500, BRV: 1800, COR: 2200, DUN: 600, EST: 400 }, growth: 0.015, tradeShare: 0.05 },
  { code: "C300", label: "industrial machinery", unit: "kt", base: { ALD: 150, BRV: 90, COR: 20, DUN: 10, EST: 30 }, growth: 0.03, tradeShare: 0.4 },
  { code: "C400", label: "beverage cans", unit: "kt", base: { ALD: 40, BRV: 25, COR: 30, DUN: 8, EST: 6 }, growth: 0.035, tradeShare: 0.25 },
  { code: "C410", label: "plastic film packaging", unit: "kt", base: { ALD: 60, BRV: 45, COR: 50, DUN: 15, EST: 10 }, growth: 0.04, tradeShare: 0.2 },
];

/** Products of the cohort models, their commodities (with the concordance's factor) and their growth. */
const PRODUCTS = [
  { name: "vehicles", commodities: [["C100", 1]], growth: 0.025 },
  { name: "buildings", commodities: [["C200", 0.98], ["C210", 1]], growth: 0.016 },
  { name: "machinery", commodities: [["C300", 1]], growth: 0.03 },
  { name: "packaging", commodities: [["C400", 0.95], ["C410", 1]], growth: 0.038 },
] as const;

/** The expected 1990 apparent consumption of a product in a region, in t (production − exports + imports, before noise). */
function inflow1990(r: string, product: string): number {
  const p = PRODUCTS.find((x) => x.name === product)!;
  let total = 0;
  for (const [code, factor] of p.commodities) {
    const c = COMMODITIES.find((x) => x.code === code)!;
    const mass = c.unit === "piece" ? 1.35 : c.unit === "kt" ? 1000 : 1;
    const own = c.base[r]! * (1 - c.tradeShare);
    const imports = REGIONS.filter((e) => e !== r).reduce((a, e) => a + (c.base[e]! * c.tradeShare) / 4, 0);
    total += factor * mass * (own + imports);
  }
  return total;
}

/** The share of a product's first commodity (steel in buildings, aluminium in packaging) in its expected apparent consumption in a year. */
function mixShare(r: string, product: string, year: number): number {
  const p = PRODUCTS.find((x) => x.name === product)!;
  const mass = p.commodities.map(([code, factor]) => {
    const c = COMMODITIES.find((x) => x.code === code)!;
    const unit = c.unit === "kt" ? 1000 : 1;
    const g = Math.pow(1 + c.growth, year - FIRST_YEAR);
    const imports = REGIONS.filter((e) => e !== r).reduce((acc, e) => acc + (c.base[e]! * c.tradeShare) / 4, 0);
    return factor * unit * g * (c.base[r]! * (1 - c.tradeShare) + imports);
  });
  return mass[0]! / (mass[0]! + mass[1]!);
}

/** The lifetime of the demo's cohorts before 2006 (as in lifetimes.csv). */
function lifetimeOf(r: string, product: string): { distribution: string; mean: number; sd?: number } {
  if (product === "vehicles") return { distribution: "weibull", mean: 14, sd: 5 };
  if (product === "buildings") return r === "EST" ? { distribution: "truncated-normal", mean: 45, sd: 15 } : { distribution: "lognormal", mean: 60, sd: 20 };
  if (product === "machinery") return { distribution: "gamma", mean: 25, sd: 8 };
  return { distribution: "exponential", mean: 1.2 };
}

/** A code that the concordance does not cover: it must show up as unmapped, not vanish. */
const UNMAPPED = { code: "C999", label: "unclassified goods" };

function fmt(x: number): string {
  return Number.isInteger(x) ? String(x) : x.toFixed(3);
}

export function generateDemo(dir: string, seed = 20261201): void {
  const rnd = mulberry32(seed);
  mkdirSync(dir, { recursive: true });
  const prod: string[] = ["region,commodity,year,quantity"];
  const trade: string[] = ["reporter,partner,commodity,flow,year,quantity,unit"];
  for (const c of COMMODITIES) {
    for (const r of REGIONS) {
      for (let y = FIRST_YEAR; y <= LAST_YEAR; y++) {
        const b = c.base[r]!;
        if (b === 0) continue;
        const q = b * Math.pow(1 + c.growth, y - FIRST_YEAR) * (0.92 + 0.16 * rnd());
        // production file is in kt (pieces for vehicles are converted by the demo to kt via the concordance's unit mass)
        const qty = c.unit === "piece" ? Math.round(q) : q;
        prod.push([r, c.code, y, c.unit === "piece" ? fmt(qty * 1.35 / 1000) : fmt(qty)].join(","));
      }
    }
  }
  // Bilateral trade: each exporter sends a share of its production to each partner.
  for (let y = FIRST_YEAR; y <= LAST_YEAR; y++) {
    for (const c of COMMODITIES) {
      for (const exp of REGIONS) {
        for (const imp of REGIONS) {
          if (exp === imp) continue;
          let base = c.base[exp]! * Math.pow(1 + c.growth, y - FIRST_YEAR) * c.tradeShare / 4;
          // Estrava re-exports machinery in 2012–2016: its exports exceed what it makes and buys.
          if (c.code === "C300" && exp === "EST" && y >= 2012 && y <= 2016) base *= 6;
          if (base === 0) continue;
          const q = base * (0.9 + 0.2 * rnd());
          const asym = 1 + (rnd() - 0.5) * 0.06; // small reporting differences between the two sides
          const unit = c.unit === "piece" ? "pieces" : "t";
          const v = (x: number) => (c.unit === "piece" ? String(Math.round(x)) : fmt(c.unit === "kt" ? x * 1000 : x));
          // Dunmoor did not report trade in 2005–2009: mirror fill recovers it from partners.
          if (!(exp === "DUN" && y >= 2005 && y <= 2009)) trade.push([exp, imp, c.code, "export", y, v(q), unit].join(","));
          if (!(imp === "DUN" && y >= 2005 && y <= 2009)) trade.push([imp, exp, c.code, "import", y, v(q * asym), unit].join(","));
        }
      }
    }
    // A small flow of an unclassified code, reported by Aldmark only.
    trade.push(["ALD", "BRV", UNMAPPED.code, "import", y, fmt(50 + 10 * rnd()), "t"].join(","));
  }
  const conc = [
    "commodity,product,material,factor,share,unit_mass",
    "C100,vehicles,steel,1,0.65,1350",
    "C100,vehicles,aluminium,1,0.13,1350",
    "C100,vehicles,plastics,1,0.18,1350",
    "C100,vehicles,copper,1,0.04,1350",
    "C200,buildings,steel,0.98,1,",
    "C210,buildings,cement,1,1,",
    "C300,machinery,steel,1,0.7,",
    "C300,machinery,copper,1,0.1,",
    "C300,machinery,aluminium,1,0.2,",
    "C400,packaging,aluminium,0.95,1,",
    "C410,packaging,plastics,1,1,",
  ];
  // Note: C100 production is given in kt of vehicles (the statistics publish mass), trade in pieces.
  const groups = ["member,group", ...REGIONS.map((r) => `${r},WORLD`), "ALD,NORTH", "DUN,NORTH", "BRV,SOUTH", "COR,SOUTH", "EST,SOUTH"];
  const regions = ["region,name", ...REGIONS.map((r) => `${r},${REGION_NAMES[r]}`)];
  const commodities = ["commodity,label", ...COMMODITIES.map((c) => `${c.code},${c.label}`), `${UNMAPPED.code},${UNMAPPED.label}`];
  // Cohort models: lifetimes by product (and one region-specific row), content by cohort, the
  // stock in place by age, and an invented population path with per-capita stock targets.
  const lifetimes = [
    "region,product,first_cohort,last_cohort,distribution,mean,sd,shape,scale",
    ",vehicles,,2005,weibull,14,5,,",
    ",vehicles,2006,,weibull,16,5,,",
    ",buildings,,,lognormal,60,20,,",
    "EST,buildings,,,truncated-normal,45,15,,",
    ",machinery,,,gamma,25,8,,",
    ",packaging,,,exponential,1.2,,,",
  ];
  // Content by cohort: vehicles change their mix in 2006 (less steel, more aluminium; 1 % of the
  // later cars' mass is in materials not tracked); buildings and packaging take each region's
  // mix of the commodities that make them (so the stock's materials agree with apparent
  // consumption's), as in 1997 for cohorts up to 2005 and as in 2015 after.
  const content = [
    "region,product,material,first_cohort,last_cohort,content",
    ",vehicles,steel,,2005,0.67",
    ",vehicles,steel,2006,,0.63",
    ",vehicles,aluminium,,2005,0.11",
    ",vehicles,aluminium,2006,,0.14",
    ",vehicles,plastics,,,0.18",
    ",vehicles,copper,,,0.04",
    ",machinery,steel,,,0.7",
    ",machinery,copper,,,0.1",
    ",machinery,aluminium,,,0.2",
  ];
  for (const r of REGIONS) {
    for (const [product, a, b] of [["buildings", "steel", "cement"], ["packaging", "aluminium", "plastics"]] as const) {
      const early = mixShare(r, product, 1997);
      const late = mixShare(r, product, 2015);
      content.push(`${r},${product},${a},,2005,${early.toFixed(3)}`, `${r},${product},${b},,2005,${(1 - early).toFixed(3)}`);
      content.push(`${r},${product},${a},2006,,${late.toFixed(3)}`, `${r},${product},${b},2006,,${(1 - late).toFixed(3)}`);
    }
  }
  const popBase: Record<string, number> = { ALD: 9.5e6, BRV: 6.1e6, COR: 7.4e6, DUN: 1.9e6, EST: 1.2e6 };
  const popGrowth: Record<string, number> = { ALD: 0.001, BRV: 0.004, COR: 0.009, DUN: -0.004, EST: 0.002 };
  // The stock in place at the end of 1989, by age: what the 1990 inflow, grown back at each
  // product's rate, leaves of every earlier cohort (σ of its lifetime). A history that grew into
  // 1990, so the stock keeps growing after it (no shrinking fleet in a growing economy).
  const initial = ["region,product,age,value"];
  for (const r of REGIONS) for (const p of PRODUCTS) {
    const i1990 = inflow1990(r, p.name);
    if (i1990 <= 0) continue;
    const lt = makeLifetime(lifetimeOf(r, p.name), `demo ${r} ${p.name}`);
    for (let a = 0; a < 250; a++) {
      const v = i1990 * Math.pow(1 + p.growth, -(a + 1)) * sigmaAt(lt, a);
      if (v < 0.5) break; // half a tonne: the rest of the tail is left out of the invented stock
      initial.push(`${r},${p.name},${a},${fmt(v)}`);
    }
  }
  const pop = ["region,year,population"];
  for (const r of REGIONS) for (let y = FIRST_YEAR; y <= 2050; y++) pop.push(`${r},${y},${Math.round(popBase[r]! * Math.pow(1 + popGrowth[r]!, y - 2023))}`);
  // Scenario: per-capita stock relative to its 2023 level (index 1), in 2035 and 2050. Stocks
  // saturate; Corrinth catches up in vehicles; Dunmoor's vehicle stock per person falls after
  // 2035 (a car-light policy): the model must flag the negative inflow that needs.
  const targets = ["region,product,year,index"];
  for (const r of REGIONS) for (const p of PRODUCTS) {
    const cor = r === "COR" && p.name === "vehicles";
    const dun = r === "DUN" && p.name === "vehicles";
    targets.push(`${r},${p.name},2035,${fmt(cor ? 1.6 : 1 + p.growth * 4)}`);
    targets.push(`${r},${p.name},2050,${fmt(cor ? 2.1 : dun ? 0.75 : 1 + p.growth * 6)}`);
  }
  // Codes of an invented statistical office for the SDMX-CSV exports.
  const officeCodes = ["value,code,label", ...REGIONS.map((r, i) => `${r},R${String(i + 1).padStart(2, "0")},${REGION_NAMES[r]}`)];
  const materialCodes = ["value,code,label", "aluminium,AL,aluminium", "cement,CEM,cement", "copper,CU,copper", "plastics,PLS,plastics", "steel,ST,steel"];
  writeFileSync(path.join(dir, "office_region_codes.csv"), officeCodes.join("\n") + "\n");
  writeFileSync(path.join(dir, "office_material_codes.csv"), materialCodes.join("\n") + "\n");
  writeFileSync(path.join(dir, "lifetimes.csv"), lifetimes.join("\n") + "\n");
  writeFileSync(path.join(dir, "content.csv"), content.join("\n") + "\n");
  writeFileSync(path.join(dir, "initial_stock.csv"), initial.join("\n") + "\n");
  writeFileSync(path.join(dir, "population.csv"), pop.join("\n") + "\n");
  writeFileSync(path.join(dir, "stock_targets.csv"), targets.join("\n") + "\n");
  writeFileSync(path.join(dir, "production.csv"), prod.join("\n") + "\n");
  writeFileSync(path.join(dir, "trade.csv"), trade.join("\n") + "\n");
  writeFileSync(path.join(dir, "concordance.csv"), conc.join("\n") + "\n");
  writeFileSync(path.join(dir, "region_groups.csv"), groups.join("\n") + "\n");
  writeFileSync(path.join(dir, "regions.csv"), regions.join("\n") + "\n");
  writeFileSync(path.join(dir, "commodities.csv"), commodities.join("\n") + "\n");
}

if (process.argv[1] && import.meta.url === new URL(`file://${path.resolve(process.argv[1])}`).href) {
  generateDemo(process.argv[2] ?? "data-samples/demo");
}
