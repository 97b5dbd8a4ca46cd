;; Batched cohort kernels, WebAssembly SIMD (f64x2). All arrays are row-major f64 with a row
;; stride of T values (no padding), so they can be used in place wherever they live in memory.
;; The memory is imported: a thread's own, or the shared arena the worker threads compute in.
;; Assembled to kernels-binary.ts by scripts/build-wasm.mjs (npm run build:wasm), twice: as
;; written (f64x2.relaxed_madd, a fused multiply-add where the CPU has one) and with every
;; relaxed_madd spelled as a multiply and an add, for engines without relaxed SIMD.
;; Keep each relaxed_madd in the form (f64x2.relaxed_madd (local.get $a) (local.get $b) (local.get $c)):
;; the build script rewrites exactly that form.
(module
  (import "env" "mem" (memory 1 65536 shared))

  ;; Stores the first `rem` (1..4) of the four years (a0 = years 0-1, a1 = years 2-3) at o.
  (func $put (param $o i32) (param $rem i32) (param $a0 v128) (param $a1 v128)
    (if (i32.ge_u (local.get $rem) (i32.const 2))
      (then
        (v128.store (local.get $o) (local.get $a0))
        (if (i32.ge_u (local.get $rem) (i32.const 4))
          (then (v128.store offset=16 (local.get $o) (local.get $a1)))
          (else (if (i32.eq (local.get $rem) (i32.const 3))
            (then (v128.store64_lane offset=16 0 (local.get $o) (local.get $a1)))))))
      (else (v128.store64_lane 0 (local.get $o) (local.get $a0)))))

  ;; out[s, t] = Σ_{c ≤ t} inp[s, c] · M[c, t]   for s < n, t < T; n is a multiple of 4.
  ;; M comes in panels of 4 years: panel b (years 4b..4b+3) holds, for each cohort c ≤ 4b+3,
  ;; the 4 values M[c, 4b..4b+3] contiguously, at double offset b·tp·4 + c·4 (tp = T rounded
  ;; up to a multiple of 4; years ≥ T are 0).
  ;; 4 series × 4 years per block: 8 accumulators of two years each. The cohort loop is not
  ;; unrolled on purpose: unrolled, the optimising compiler hoists the loads and spills the
  ;; accumulators to the stack, which halves the speed.
;; Loop order: series are taken in chunks (see $chunk); within a chunk, year blocks are the
  ;; outer loop and 4-series blocks the inner one, so that one panel of M (at most 32·T bytes)
  ;; serves every series of the chunk from the first-level cache while the chunk's rows stay in
  ;; the second-level cache. With chunks of 4 series this is the plain order (all of M per 4 series).
  (func $product (export "product") (param $I i32) (param $M i32) (param $O i32) (param $n i32) (param $T i32)
    (local $rb i32) (local $tp i32) (local $s0 i32) (local $t0 i32) (local $c i32) (local $cend i32)
    (local $p0 i32) (local $p1 i32) (local $p2 i32) (local $p3 i32) (local $mp i32) (local $o i32) (local $row i32)
    (local $cs i32) (local $ce i32) (local $ch i32) (local $mb i32)
    (local $a00 v128) (local $a01 v128) (local $a10 v128) (local $a11 v128)
    (local $a20 v128) (local $a21 v128) (local $a30 v128) (local $a31 v128)
    (local $m0 v128) (local $m1 v128) (local $x v128)
    (local.set $rb (i32.shl (local.get $T) (i32.const 3)))
    (local.set $tp (i32.and (i32.add (local.get $T) (i32.const 3)) (i32.const -4)))
    (local.set $ch (call $chunk (local.get $T)))
    (local.set $cs (i32.const 0))
    (block $chdone
      (loop $chloop
        (br_if $chdone (i32.ge_u (local.get $cs) (local.get $n)))
        (local.set $ce (i32.add (local.get $cs) (local.get $ch)))
        (if (i32.gt_u (local.get $ce) (local.get $n)) (then (local.set $ce (local.get $n))))
        (local.set $t0 (i32.const 0))
        (block $tdone
          (loop $tloop
            (br_if $tdone (i32.ge_u (local.get $t0) (local.get $T)))
            (local.set $mb (i32.add (local.get $M) (i32.shl (i32.mul (local.get $t0) (local.get $tp)) (i32.const 3))))
            ;; cohorts 0 .. min(t0 + 3, T − 1)
            (local.set $cend (i32.add (local.get $t0) (i32.const 4)))
            (if (i32.gt_u (local.get $cend) (local.get $T)) (then (local.set $cend (local.get $T))))
            (local.set $s0 (local.get $cs))
            (block $sdone
              (loop $sloop
                (br_if $sdone (i32.ge_u (local.get $s0) (local.get $ce)))
                (local.set $row (i32.mul (local.get $s0) (local.get $rb)))
                (local.set $a00 (v128.const f64x2 0 0)) (local.set $a01 (v128.const f64x2 0 0))
                (local.set $a10 (v128.const f64x2 0 0)) (local.set $a11 (v128.const f64x2 0 0))
                (local.set $a20 (v128.const f64x2 0 0)) (local.set $a21 (v128.const f64x2 0 0))
                (local.set $a30 (v128.const f64x2 0 0)) (local.set $a31 (v128.const f64x2 0 0))
                ;; row pointers into inp at cohort 0
                (local.set $p0 (i32.add (local.get $I) (local.get $row)))
                (local.set $p1 (i32.add (local.get $p0) (local.get $rb)))
                (local.set $p2 (i32.add (local.get $p1) (local.get $rb)))
                (local.set $p3 (i32.add (local.get $p2) (local.get $rb)))
                (local.set $mp (local.get $mb))
                (local.set $c (i32.const 0))
                (loop $cloop
                  (local.set $m0 (v128.load (local.get $mp)))
                  (local.set $m1 (v128.load offset=16 (local.get $mp)))
                  (local.set $x (v128.load64_splat (local.get $p0)))
                  (local.set $a00 (f64x2.relaxed_madd (local.get $x) (local.get $m0) (local.get $a00)))
                  (local.set $a01 (f64x2.relaxed_madd (local.get $x) (local.get $m1) (local.get $a01)))
                  (local.set $x (v128.load64_splat (local.get $p1)))
                  (local.set $a10 (f64x2.relaxed_madd (local.get $x) (local.get $m0) (local.get $a10)))
                  (local.set $a11 (f64x2.relaxed_madd (local.get $x) (local.get $m1) (local.get $a11)))
                  (local.set $x (v128.load64_splat (local.get $p2)))
                  (local.set $a20 (f64x2.relaxed_madd (local.get $x) (local.get $m0) (local.get $a20)))
                  (local.set $a21 (f64x2.relaxed_madd (local.get $x) (local.get $m1) (local.get $a21)))
                  (local.set $x (v128.load64_splat (local.get $p3)))
                  (local.set $a30 (f64x2.relaxed_madd (local.get $x) (local.get $m0) (local.get $a30)))
                  (local.set $a31 (f64x2.relaxed_madd (local.get $x) (local.get $m1) (local.get $a31)))
                  (local.set $p0 (i32.add (local.get $p0) (i32.const 8)))
                  (local.set $p1 (i32.add (local.get $p1) (i32.const 8)))
                  (local.set $p2 (i32.add (local.get $p2) (i32.const 8)))
                  (local.set $p3 (i32.add (local.get $p3) (i32.const 8)))
                  (local.set $mp (i32.add (local.get $mp) (i32.const 32)))
                  (local.set $c (i32.add (local.get $c) (i32.const 1)))
                  (br_if $cloop (i32.lt_u (local.get $c) (local.get $cend))))
                (local.set $o (i32.add (i32.add (local.get $O) (local.get $row)) (i32.shl (local.get $t0) (i32.const 3))))
                (if (i32.le_u (i32.add (local.get $t0) (i32.const 4)) (local.get $T))
                  (then
                    (v128.store (local.get $o) (local.get $a00))
                    (v128.store offset=16 (local.get $o) (local.get $a01))
                    (local.set $o (i32.add (local.get $o) (local.get $rb)))
                    (v128.store (local.get $o) (local.get $a10))
                    (v128.store offset=16 (local.get $o) (local.get $a11))
                    (local.set $o (i32.add (local.get $o) (local.get $rb)))
                    (v128.store (local.get $o) (local.get $a20))
                    (v128.store offset=16 (local.get $o) (local.get $a21))
                    (local.set $o (i32.add (local.get $o) (local.get $rb)))
                    (v128.store (local.get $o) (local.get $a30))
                    (v128.store offset=16 (local.get $o) (local.get $a31)))
                  (else
                    ;; the last, partial block of years
                    (local.set $c (i32.sub (local.get $T) (local.get $t0)))
                    (call $put (local.get $o) (local.get $c) (local.get $a00) (local.get $a01))
                    (local.set $o (i32.add (local.get $o) (local.get $rb)))
                    (call $put (local.get $o) (local.get $c) (local.get $a10) (local.get $a11))
                    (local.set $o (i32.add (local.get $o) (local.get $rb)))
                    (call $put (local.get $o) (local.get $c) (local.get $a20) (local.get $a21))
                    (local.set $o (i32.add (local.get $o) (local.get $rb)))
                    (call $put (local.get $o) (local.get $c) (local.get $a30) (local.get $a31))))
                (local.set $s0 (i32.add (local.get $s0) (i32.const 4)))
                (br $sloop)))
            (local.set $t0 (i32.add (local.get $t0) (i32.const 4)))
            (br $tloop)))
        (local.set $cs (local.get $ce))
        (br $chloop))))

  ;; Series per chunk for horizon T (a multiple of 4). While the panels of M (about 4·T² bytes)
  ;; fit a second-level cache of 512 KB (T ≤ 362), 4: each 4 series read all of M from
  ;; there. Beyond, chunks whose rows of inp take about 256 KB (at least 4 series).
  (func $chunk (param $T i32) (result i32)
    (local $ch i32)
    (if (i32.le_u (local.get $T) (i32.const 362)) (then (return (i32.const 4))))
    (local.set $ch (i32.and (i32.div_u (i32.const 32768) (local.get $T)) (i32.const -4)))
    (if (result i32) (i32.lt_u (local.get $ch) (i32.const 4)) (then (i32.const 4)) (else (local.get $ch))))

  ;; Inflow-driven model in one call: outflow O = product(I, M) (+ initOut, the initial
  ;; stock's outflow, when initOut ≠ 0), then the balance per series:
  ;;   S[s, t] = S[s, t − 1] + I[s, t] − O[s, t], D[s, t] = S[s, t] − S[s, t − 1], S[s, −1] = stock0[s]
  ;; (stock0 = 0: none). Same layout rules as product. One chunk of series at a time ($chunk:
  ;; 4 series up to moderate horizons): the product for them, then their balance while their
  ;; rows are still in cache.
  (func (export "inflow") (param $I i32) (param $M i32) (param $O i32) (param $S i32) (param $D i32)
        (param $initOut i32) (param $stock0 i32) (param $n i32) (param $T i32)
    (local $rb i32) (local $s0 i32) (local $i i32) (local $end i32) (local $s i32) (local $prev f64) (local $o f64) (local $v f64) (local $ch i32) (local $full i32)
    (local.set $rb (i32.shl (local.get $T) (i32.const 3)))
    (local.set $full (call $chunk (local.get $T)))
    (local.set $s0 (i32.const 0))
    (block $bdone
      (loop $bloop
        (br_if $bdone (i32.ge_u (local.get $s0) (local.get $n)))
        (local.set $ch (local.get $full))
        (if (i32.gt_u (local.get $ch) (i32.sub (local.get $n) (local.get $s0))) (then (local.set $ch (i32.sub (local.get $n) (local.get $s0)))))
        (call $product (i32.add (local.get $I) (i32.mul (local.get $s0) (local.get $rb))) (local.get $M)
                       (i32.add (local.get $O) (i32.mul (local.get $s0) (local.get $rb))) (local.get $ch) (local.get $T))
        (local.set $s (local.get $s0))
        (local.set $s0 (i32.add (local.get $s0) (local.get $ch)))
        (block $sdone
          (loop $sloop
            (br_if $sdone (i32.ge_u (local.get $s) (local.get $s0)))
            (local.set $prev (f64.const 0))
            (if (local.get $stock0)
              (then (local.set $prev (f64.load (i32.add (local.get $stock0) (i32.shl (local.get $s) (i32.const 3)))))))
            ;; byte offset of element (s, 0)
            (local.set $i (i32.mul (local.get $s) (local.get $rb)))
            (local.set $end (i32.add (local.get $i) (local.get $rb)))
            (block $tdone
              (loop $tloop
                (br_if $tdone (i32.ge_u (local.get $i) (local.get $end)))
                (local.set $o (f64.load (i32.add (local.get $O) (local.get $i))))
                (if (local.get $initOut)
                  (then
                    (local.set $o (f64.add (local.get $o) (f64.load (i32.add (local.get $initOut) (local.get $i)))))
                    (f64.store (i32.add (local.get $O) (local.get $i)) (local.get $o))))
                (local.set $v (f64.sub (f64.add (local.get $prev) (f64.load (i32.add (local.get $I) (local.get $i)))) (local.get $o)))
                (f64.store (i32.add (local.get $S) (local.get $i)) (local.get $v))
                (f64.store (i32.add (local.get $D) (local.get $i)) (f64.sub (local.get $v) (local.get $prev)))
                (local.set $prev (local.get $v))
                (local.set $i (i32.add (local.get $i) (i32.const 8)))
                (br $tloop)))
            (local.set $s (i32.add (local.get $s) (i32.const 1)))
            (br $sloop)))
        (br $bloop))))

  ;; Stock-driven solve, 4 series and 2 years at a time (n multiple of 4):
  ;;   I[s, t] = (Z[s, t] − Σ_{c<t} I[s, c]·St[t, c] − init[s, t]) / St[t, t]
  ;; St is T × T (row = year, column = cohort). init may be 0 (none). clamp ≠ 0 sets negative I to 0.
  ;; A[s, t] receives the achieved stock. Years t (even) and t + 1 share the cohorts c < t: one
  ;; pass over them feeds 8 independent accumulators (4 series × 2 years); year t + 1 then adds
  ;; cohort t once I[s, t] is known. Loads and accumulators fit the 16 vector registers.
  (func (export "solve") (param $Z i32) (param $St i32) (param $init i32) (param $I i32) (param $A i32)
        (param $n i32) (param $T i32) (param $clamp i32)
    (local $rb i32) (local $s0 i32) (local $t i32) (local $j i32) (local $has1 i32)
    (local $st0 i32) (local $st1 i32) (local $sp0 i32) (local $sp1 i32) (local $r i32) (local $q i32) (local $e i32) (local $at i32)
    (local $a0 v128) (local $a1 v128) (local $a2 v128) (local $a3 v128)
    (local $b0 v128) (local $b1 v128) (local $b2 v128) (local $b3 v128) (local $m0 v128) (local $m1 v128) (local $w v128)
    (local $sa f64) (local $sb f64) (local $d f64) (local $x f64) (local $base f64)
    (local.set $rb (i32.shl (local.get $T) (i32.const 3)))
    (local.set $s0 (i32.const 0))
    (block $sdone
      (loop $sloop
        (br_if $sdone (i32.ge_u (local.get $s0) (local.get $n)))
        (local.set $r (i32.mul (local.get $s0) (local.get $rb)))  ;; byte offset of row s0
        (local.set $t (i32.const 0))
        (block $tdone
          (loop $tloop
            (br_if $tdone (i32.ge_u (local.get $t) (local.get $T)))
            (local.set $a0 (v128.const f64x2 0 0)) (local.set $a1 (v128.const f64x2 0 0))
            (local.set $a2 (v128.const f64x2 0 0)) (local.set $a3 (v128.const f64x2 0 0))
            (local.set $b0 (v128.const f64x2 0 0)) (local.set $b1 (v128.const f64x2 0 0))
            (local.set $b2 (v128.const f64x2 0 0)) (local.set $b3 (v128.const f64x2 0 0))
            (local.set $st0 (i32.add (local.get $St) (i32.mul (local.get $t) (local.get $rb))))
            (local.set $has1 (i32.lt_u (i32.add (local.get $t) (i32.const 1)) (local.get $T)))
            (local.set $st1 (select (i32.add (local.get $st0) (local.get $rb)) (local.get $st0) (local.get $has1)))
            (local.set $sp0 (local.get $st0))
            (local.set $sp1 (local.get $st1))
            (local.set $q (i32.add (local.get $I) (local.get $r)))
            ;; cohorts 0 .. t − 1, two at a time (t is even)
            (local.set $e (i32.add (local.get $q) (i32.shl (local.get $t) (i32.const 3))))
            (block $cdone
              (br_if $cdone (i32.ge_u (local.get $q) (local.get $e)))
              (loop $cloop
                (local.set $m0 (v128.load (local.get $sp0)))
                (local.set $m1 (v128.load (local.get $sp1)))
                (local.set $w (v128.load (local.get $q)))
                (local.set $a0 (f64x2.relaxed_madd (local.get $w) (local.get $m0) (local.get $a0)))
                (local.set $b0 (f64x2.relaxed_madd (local.get $w) (local.get $m1) (local.get $b0)))
                (local.set $w (v128.load (i32.add (local.get $q) (local.get $rb))))
                (local.set $a1 (f64x2.relaxed_madd (local.get $w) (local.get $m0) (local.get $a1)))
                (local.set $b1 (f64x2.relaxed_madd (local.get $w) (local.get $m1) (local.get $b1)))
                (local.set $w (v128.load (i32.add (local.get $q) (i32.shl (local.get $rb) (i32.const 1)))))
                (local.set $a2 (f64x2.relaxed_madd (local.get $w) (local.get $m0) (local.get $a2)))
                (local.set $b2 (f64x2.relaxed_madd (local.get $w) (local.get $m1) (local.get $b2)))
                (local.set $w (v128.load (i32.add (local.get $q) (i32.mul (local.get $rb) (i32.const 3)))))
                (local.set $a3 (f64x2.relaxed_madd (local.get $w) (local.get $m0) (local.get $a3)))
                (local.set $b3 (f64x2.relaxed_madd (local.get $w) (local.get $m1) (local.get $b3)))
                (local.set $q (i32.add (local.get $q) (i32.const 16)))
                (local.set $sp0 (i32.add (local.get $sp0) (i32.const 16)))
                (local.set $sp1 (i32.add (local.get $sp1) (i32.const 16)))
                (br_if $cloop (i32.lt_u (local.get $q) (local.get $e)))))
            ;; finish each of the 4 series: year t, then year t + 1
            (local.set $j (i32.const 0))
            (loop $jloop
              (local.set $sa (if (result f64) (i32.eqz (local.get $j))
                  (then (f64.add (f64x2.extract_lane 0 (local.get $a0)) (f64x2.extract_lane 1 (local.get $a0))))
                  (else (if (result f64) (i32.eq (local.get $j) (i32.const 1))
                    (then (f64.add (f64x2.extract_lane 0 (local.get $a1)) (f64x2.extract_lane 1 (local.get $a1))))
                    (else (if (result f64) (i32.eq (local.get $j) (i32.const 2))
                      (then (f64.add (f64x2.extract_lane 0 (local.get $a2)) (f64x2.extract_lane 1 (local.get $a2))))
                      (else (f64.add (f64x2.extract_lane 0 (local.get $a3)) (f64x2.extract_lane 1 (local.get $a3))))))))))
              (local.set $sb (if (result f64) (i32.eqz (local.get $j))
                  (then (f64.add (f64x2.extract_lane 0 (local.get $b0)) (f64x2.extract_lane 1 (local.get $b0))))
                  (else (if (result f64) (i32.eq (local.get $j) (i32.const 1))
                    (then (f64.add (f64x2.extract_lane 0 (local.get $b1)) (f64x2.extract_lane 1 (local.get $b1))))
                    (else (if (result f64) (i32.eq (local.get $j) (i32.const 2))
                      (then (f64.add (f64x2.extract_lane 0 (local.get $b2)) (f64x2.extract_lane 1 (local.get $b2))))
                      (else (f64.add (f64x2.extract_lane 0 (local.get $b3)) (f64x2.extract_lane 1 (local.get $b3))))))))))
              ;; at: byte offset of (row s0 + j, year t)
              (local.set $at (i32.add (i32.add (local.get $r) (i32.mul (local.get $j) (local.get $rb))) (i32.shl (local.get $t) (i32.const 3))))
              (local.set $d (f64.load (i32.add (local.get $st0) (i32.shl (local.get $t) (i32.const 3)))))
              (local.set $base (local.get $sa))
              (if (local.get $init)
                (then (local.set $base (f64.add (local.get $base) (f64.load (i32.add (local.get $init) (local.get $at)))))))
              (local.set $x (f64.div (f64.sub (f64.load (i32.add (local.get $Z) (local.get $at))) (local.get $base)) (local.get $d)))
              (if (i32.and (i32.ne (local.get $clamp) (i32.const 0)) (f64.lt (local.get $x) (f64.const 0)))
                (then (local.set $x (f64.const 0))))
              (f64.store (i32.add (local.get $I) (local.get $at)) (local.get $x))
              (f64.store (i32.add (local.get $A) (local.get $at)) (f64.add (local.get $base) (f64.mul (local.get $x) (local.get $d))))
              (if (local.get $has1)
                (then
                  ;; year t + 1: cohort t enters with the inflow just found
                  (local.set $base (f64.add (local.get $sb)
                    (f64.mul (local.get $x) (f64.load (i32.add (local.get $st1) (i32.shl (local.get $t) (i32.const 3)))))))
                  (local.set $at (i32.add (local.get $at) (i32.const 8)))
                  (local.set $d (f64.load offset=8 (i32.add (local.get $st1) (i32.shl (local.get $t) (i32.const 3)))))
                  (if (local.get $init)
                    (then (local.set $base (f64.add (local.get $base) (f64.load (i32.add (local.get $init) (local.get $at)))))))
                  (local.set $x (f64.div (f64.sub (f64.load (i32.add (local.get $Z) (local.get $at))) (local.get $base)) (local.get $d)))
                  (if (i32.and (i32.ne (local.get $clamp) (i32.const 0)) (f64.lt (local.get $x) (f64.const 0)))
                    (then (local.set $x (f64.const 0))))
                  (f64.store (i32.add (local.get $I) (local.get $at)) (local.get $x))
                  (f64.store (i32.add (local.get $A) (local.get $at)) (f64.add (local.get $base) (f64.mul (local.get $x) (local.get $d))))))
              (local.set $j (i32.add (local.get $j) (i32.const 1)))
              (br_if $jloop (i32.lt_u (local.get $j) (i32.const 4))))
            (local.set $t (i32.add (local.get $t) (i32.const 2)))
            (br $tloop)))
        (local.set $s0 (i32.add (local.get $s0) (i32.const 4)))
        (br $sloop))))
)
