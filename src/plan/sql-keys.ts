/**
 * Is an `sql` step's query per key? For a sharded run (src/plan/shard.ts) a query may run in
 * every shard on its shard's rows only when, by its form, the rows it gives for one value of the
 * shard key depend on the input rows of that value alone (and on tables read whole). This file
 * decides that from DuckDB's own parse tree (json_serialize_sql), conservatively: anything it
 * does not recognise makes the query run at the merge instead, which is always correct.
 *
 * A relation is *partitioned* when each shard holds only its own keys' rows of it (a source
 * filtered by the key, an earlier shard step's table), or *whole* (read whole in every shard).
 * Some of its columns hold the key. Accepted, on partitioned relations:
 * - projections and filters without subqueries (WHERE, HAVING, QUALIFY);
 * - joins with a whole relation that keep the partitioned side's rows (inner, cross, left from
 *   the partitioned side, semi and anti joins of the partitioned side), and joins of two
 *   partitioned relations on equal keys (USING, NATURAL, or an equality in ON);
 * - grouping whose every grouping set holds a key column (GROUP BY ALL with a key column
 *   among the plain columns), window functions partitioned by a key column, DISTINCT with a
 *   key column in the result (DISTINCT ON a key column);
 * - UNION ALL of partitioned branches, UNION, INTERSECT and EXCEPT on a shared key column
 *   (EXCEPT and INTERSECT also with a whole right side), CTEs and subqueries in FROM.
 * Refused: LIMIT, subqueries in expressions, aggregates over the whole table, a union of a
 * partitioned and a whole branch, full outer joins with a whole side, lateral and positional
 * joins, recursive CTEs, COLUMNS(...), anything unknown. The query is per key when its result
 * is partitioned and its output column named after the shard key holds the key.
 */

export interface Rel {
  columns: string[];
  /** key[i]: column i holds the shard key. */
  key: boolean[];
  partitioned: boolean;
}

export class NotPerKey extends Error {}

type Node = Record<string, unknown>;

interface ScopeRel {
  alias: string;
  rel: Rel;
}

interface Scope {
  rels: ScopeRel[];
  partitioned: boolean;
  /** Columns merged by USING or NATURAL: does the merged column hold the key? */
  merged: Map<string, boolean>;
}

const lc = (s: unknown) => String(s ?? "").toLowerCase();
const no = (why: string): never => {
  throw new NotPerKey(why);
};

function* nodes(x: unknown): Generator<Node> {
  if (Array.isArray(x)) {
    for (const v of x) yield* nodes(v);
    return;
  }
  if (!x || typeof x !== "object") return;
  yield x as Node;
  for (const v of Object.values(x as Node)) if (v && typeof v === "object") yield* nodes(v);
}

const hasSubquery = (e: unknown) => [...nodes(e)].some((n) => n.class === "SUBQUERY" || n.type === "SUBQUERY");

export class KeyAnalysis {
  constructor(private readonly aggregates: ReadonlySet<string>) {}

  /** The relation a whole statement gives (statement.node of json_serialize_sql). */
  query(node: Node, env: Map<string, Rel>): Rel {
    const own = new Map(env);
    const ctes = ((node.cte_map as { map?: { key: string; value: { aliases?: string[]; query: { node: Node } } }[] } | undefined)?.map) ?? [];
    for (const c of ctes) {
      const r = this.query(c.value.query.node, own);
      own.set(lc(c.key), rename(r, c.value.aliases ?? []));
    }
    let rel: Rel;
    if (node.type === "SELECT_NODE") rel = this.select(node, own);
    else if (node.type === "SET_OPERATION_NODE") rel = this.setop(node, own);
    else return no(`a ${lc(node.type).replace(/_/g, " ")} is not recognised`);
    for (const m of (node.modifiers as Node[] | undefined) ?? []) {
      if (m.type === "LIMIT_MODIFIER" || m.type === "LIMIT_PERCENT_MODIFIER") {
        if (rel.partitioned) no("LIMIT keeps a number of rows of the whole result");
      }
    }
    return rel;
  }

  private setop(node: Node, env: Map<string, Rel>): Rel {
    const l = this.query(node.left as Node, env);
    const r = this.query(node.right as Node, env);
    const kind = String(node.setop_type);
    const all = Boolean(node.setop_all);
    if (!l.partitioned && !r.partitioned) return { columns: l.columns, key: l.key.map(() => false), partitioned: false };
    const byName = kind === "UNION_BY_NAME";
    const keyBoth = l.columns.map((c, i) => {
      const j = byName ? r.columns.indexOf(c) : i;
      return Boolean(l.key[i] && j >= 0 && r.key[j]);
    });
    const common = keyBoth.some(Boolean);
    if (kind === "UNION" || byName) {
      if (!l.partitioned || !r.partitioned) no("a UNION of rows of this shard and a table read whole repeats the whole table in every shard");
      if (!all && !common) no("UNION without a key column in both branches removes duplicates across shards");
      return { columns: l.columns, key: keyBoth, partitioned: true };
    }
    if (kind === "EXCEPT" || kind === "INTERSECT") {
      if (!l.partitioned) no(`${kind} of a table read whole by rows of this shard`);
      if (r.partitioned && !common) no(`${kind} of two shards' tables without a shared key column`);
      return { columns: l.columns, key: r.partitioned ? keyBoth : l.key, partitioned: true };
    }
    return no(`set operation ${kind}`);
  }

  private select(node: Node, env: Map<string, Rel>): Rel {
    const scope = this.from(node.from_table as Node | null, env);
    for (const part of ["where_clause", "having", "qualify"] as const) {
      if (hasSubquery(node[part])) no(`a subquery in ${part === "where_clause" ? "WHERE" : part.toUpperCase()}`);
    }
    const list = (node.select_list as Node[]) ?? [];
    if (hasSubquery(list)) no("a subquery in the select list");
    // Window functions: partitioned by a key column, else they see every shard's rows.
    if (scope.partitioned) {
      for (const w of [...nodes(list), ...nodes(node.qualify)].filter((n) => n.class === "WINDOW")) {
        const parts = (w.partitions as Node[]) ?? [];
        if (!parts.some((p) => this.isKey(scope, p, null))) no(`window function ${lc(w.function_name)}() without PARTITION BY a key column`);
      }
    }
    const out = this.outputs(scope, list);
    const aggregating = ((node.group_expressions as Node[]) ?? []).length > 0 || node.aggregate_handling === "FORCE_AGGREGATES"
      || this.hasAggregate(list) || this.hasAggregate(node.having);
    if (scope.partitioned && aggregating) this.checkGroups(scope, node, list, out);
    if (scope.partitioned) {
      for (const m of (node.modifiers as Node[] | undefined) ?? []) {
        if (m.type !== "DISTINCT_MODIFIER") continue;
        const on = (m.distinct_on_targets as Node[]) ?? [];
        if (on.length ? !on.some((e) => this.isKey(scope, e, out)) : !out.key.some(Boolean)) no("DISTINCT without a key column");
      }
    }
    return { ...out, partitioned: scope.partitioned };
  }

  private hasAggregate(e: unknown): boolean {
    return [...nodes(e)].some((n) => n.class === "FUNCTION" && this.aggregates.has(lc(n.function_name)));
  }

  private checkGroups(scope: Scope, node: Node, list: Node[], out: Rel): void {
    if (node.aggregate_handling === "FORCE_AGGREGATES") {
      const plain = list.map((e, i) => (this.hasAggregate(e) ? false : out.key[i]!));
      if (!plain.some(Boolean)) no("GROUP BY ALL without a key column among the grouped columns");
      return;
    }
    const groups = (node.group_expressions as Node[]) ?? [];
    if (!groups.length) no("an aggregate over all rows (no GROUP BY)");
    const isKey = groups.map((g) => {
      if (g.class === "CONSTANT") {
        const v = (g.value as { value?: unknown } | undefined)?.value;
        const i = typeof v === "number" ? v - 1 : -1;
        return i >= 0 && i < out.key.length ? out.key[i]! : false;
      }
      return this.isKey(scope, g, out);
    });
    const sets = ((node.group_sets as number[][]) ?? []).length ? (node.group_sets as number[][]) : [groups.map((_, i) => i)];
    if (!sets.every((s) => s.some((i) => isKey[i]))) no("a grouping set without a key column (ROLLUP, CUBE or GROUPING SETS totals over every key)");
  }

  /** The select list's columns; a plain reference to a key column stays a key column. */
  private outputs(scope: Scope, list: Node[]): Rel {
    const columns: string[] = [];
    const key: boolean[] = [];
    list.forEach((e, i) => {
      if (e.class === "STAR") {
        if (e.columns || e.expr) no("COLUMNS(...) expressions");
        const rels = e.relation_name ? scope.rels.filter((r) => r.alias === lc(e.relation_name)) : scope.rels;
        const exclude = new Set(((e.exclude_list as string[]) ?? []).map(lc));
        const replace = new Set(((e.replace_list as { key?: string }[]) ?? []).map((x) => lc(x.key)));
        const seen = new Set<string>();
        for (const r of rels) {
          r.rel.columns.forEach((c, j) => {
            if (exclude.has(c) || (!e.relation_name && scope.merged.has(c) && seen.has(c))) return;
            seen.add(c);
            columns.push(c);
            key.push(!replace.has(c) && (scope.merged.has(c) && !e.relation_name ? scope.merged.get(c)! : r.rel.key[j]!));
          });
        }
        return;
      }
      const name = e.alias ? lc(e.alias) : e.class === "COLUMN_REF" ? lc((e.column_names as string[]).at(-1)) : `__expr_${i}`;
      columns.push(name);
      key.push(e.class === "COLUMN_REF" ? this.isKey(scope, e, null) : false);
    });
    return { columns, key, partitioned: scope.partitioned };
  }

  /** A column reference that holds the key (in the FROM scope, else a select alias of a key column). */
  private isKey(scope: Scope, e: Node, out: Rel | null): boolean {
    if (e.class !== "COLUMN_REF") return false;
    const names = ((e.column_names as string[]) ?? []).map(lc);
    const r = resolve(scope, names);
    if (r !== undefined) return r;
    if (out && names.length === 1) {
      const i = out.columns.indexOf(names[0]!);
      if (i >= 0) return out.key[i]!;
    }
    return false;
  }

  private from(t: Node | null, env: Map<string, Rel>): Scope {
    if (!t || t.type === "EMPTY") return { rels: [], partitioned: false, merged: new Map() };
    if (t.type === "BASE_TABLE") {
      if (t.schema_name || t.catalog_name) no(`table ${lc(t.table_name)} in another schema`);
      const rel = env.get(lc(t.table_name));
      if (!rel) return no(`table ${lc(t.table_name)} is not known to the plan`);
      return single(lc(t.alias || t.table_name), rename(rel, (t.column_name_alias as string[]) ?? []));
    }
    if (t.type === "SUBQUERY") {
      const rel = this.query((t.subquery as { node: Node }).node, env);
      return single(lc(t.alias), rename(rel, (t.column_name_alias as string[]) ?? []));
    }
    if (t.type === "TABLE_FUNCTION") {
      if (hasSubquery(t.function)) no("a subquery in a table function");
      const f = t.function as Node;
      const names = ((t.column_name_alias as string[]) ?? []).map(lc);
      const cols = names.length ? names : [lc(f.function_name)];
      return single(lc(t.alias || f.function_name), { columns: cols, key: cols.map(() => false), partitioned: false });
    }
    if (t.type === "JOIN") return this.join(t, env);
    return no(`a ${lc(t.type).replace(/_/g, " ")} in FROM`);
  }

  private join(t: Node, env: Map<string, Rel>): Scope {
    const L = this.from(t.left as Node, env);
    const R = this.from(t.right as Node, env);
    const ref = String(t.ref_type);
    const type = String(t.join_type);
    if (hasSubquery(t.condition)) no("a subquery in a join condition");
    const rels = [...L.rels, ...(type === "SEMI" || type === "ANTI" ? [] : R.rels)];
    const merged = new Map([...L.merged, ...R.merged]);
    // USING and NATURAL merge columns: the merged column holds the key if the side it comes from does.
    let using = ((t.using_columns as string[]) ?? []).map(lc);
    if (ref === "NATURAL") {
      const lcols = new Set(L.rels.flatMap((r) => r.rel.columns));
      using = [...new Set(R.rels.flatMap((r) => r.rel.columns))].filter((c) => lcols.has(c));
    }
    const keyEq: boolean[] = [];
    for (const c of using) {
      const lk = resolve(L, [c]) ?? false;
      const rk = resolve(R, [c]) ?? false;
      keyEq.push(lk && rk);
      merged.set(c, type === "LEFT" ? lk : type === "RIGHT" ? rk : type === "OUTER" ? lk && rk : lk || rk);
    }
    const onKeyEq = conjuncts(t.condition as Node | null).some((c) => {
      if (c.type !== "COMPARE_EQUAL" && c.type !== "COMPARE_NOT_DISTINCT_FROM") return false;
      const a = c.left as Node;
      const b = c.right as Node;
      const k = (s: Scope, e: Node) => e.class === "COLUMN_REF" && resolve(s, ((e.column_names as string[]) ?? []).map(lc)) === true;
      return (k(L, a) && k(R, b)) || (k(L, b) && k(R, a));
    });
    const scope: Scope = { rels, partitioned: L.partitioned || R.partitioned, merged };
    if (!L.partitioned && !R.partitioned) return scope;
    if (ref === "POSITIONAL" || ref === "DEPENDENT") no(`a ${lc(ref)} join`);
    if (L.partitioned && R.partitioned) {
      if (!keyEq.some(Boolean) && !onKeyEq) no("a join of two shards' tables without equal key columns");
      return scope;
    }
    const pLeft = L.partitioned;
    const ok = ref === "CROSS" || type === "INNER" || (type === "LEFT" && pLeft) || (type === "RIGHT" && !pLeft) || ((type === "SEMI" || type === "ANTI") && pLeft);
    if (!ok) no(`a ${lc(type)} join that keeps the rows of a table read whole`);
    return scope;
  }
}

function single(alias: string, rel: Rel): Scope {
  return { rels: [{ alias, rel }], partitioned: rel.partitioned, merged: new Map() };
}

function rename(rel: Rel, aliases: string[]): Rel {
  if (!aliases.length) return rel;
  return { ...rel, columns: rel.columns.map((c, i) => (i < aliases.length ? lc(aliases[i]) : c)) };
}

function conjuncts(e: Node | null): Node[] {
  if (!e) return [];
  if (e.type === "CONJUNCTION_AND") return ((e.children as Node[]) ?? []).flatMap(conjuncts);
  return [e];
}

/** Does the referenced column hold the key? undefined when the scope has no such column. */
function resolve(scope: Scope, names: string[]): boolean | undefined {
  if (names.length >= 2) {
    const alias = names[names.length - 2]!;
    const col = names[names.length - 1]!;
    const r = scope.rels.find((x) => x.alias === alias);
    if (!r) return undefined;
    const i = r.rel.columns.indexOf(col);
    return i < 0 ? undefined : r.rel.key[i]!;
  }
  const col = names[0]!;
  if (scope.merged.has(col)) return scope.merged.get(col)!;
  const hits = scope.rels.map((r) => r.rel.columns.indexOf(col) >= 0 ? r.rel.key[r.rel.columns.indexOf(col)]! : null).filter((x): x is boolean => x !== null);
  if (!hits.length) return undefined;
  return hits.every(Boolean);
}
