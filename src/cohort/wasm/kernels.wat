;; Batched cohort kernels, WebAssembly SIMD (f64x2). All arrays are row-major f64.
;; Assembled to kernels-binary.ts by scripts/build-wasm.mjs (npm run build:wasm).
(module
  (memory (export "mem") 1)

  ;; out[s, t] = Σ_{c ≤ t} inp[s, c] · M[c, t]   for s < np, t < tp
  ;; np and tp are multiples of 4. M comes in panels: panel b (years 4b..4b+3) holds, for each
  ;; cohort c, the 4 values M[c, 4b..4b+3] contiguously, at (b·tp·4 + c·4) doubles.
  ;; 4 series × 4 years per block: 8 accumulators of two years each.
  (func $product (export "product") (param $I i32) (param $M i32) (param $O i32) (param $np i32) (param $tp i32)
    (local $rb i32) (local $s0 i32) (local $t0 i32) (local $c i32) (local $cend i32)
    (local $p0 i32) (local $p1 i32) (local $p2 i32) (local $p3 i32) (local $mp i32) (local $o i32)
    (local $a00 v128) (local $a01 v128) (local $a10 v128) (local $a11 v128)
    (local $a20 v128) (local $a21 v128) (local $a30 v128) (local $a31 v128)
    (local $m0 v128) (local $m1 v128) (local $x v128)
    (local.set $rb (i32.shl (local.get $tp) (i32.const 3)))
    (local.set $s0 (i32.const 0))
    (block $sdone
      (loop $sloop
        (br_if $sdone (i32.ge_u (local.get $s0) (local.get $np)))
        (local.set $t0 (i32.const 0))
        (block $tdone
          (loop $tloop
            (br_if $tdone (i32.ge_u (local.get $t0) (local.get $tp)))
            (local.set $a00 (v128.const f64x2 0 0)) (local.set $a01 (v128.const f64x2 0 0))
            (local.set $a10 (v128.const f64x2 0 0)) (local.set $a11 (v128.const f64x2 0 0))
            (local.set $a20 (v128.const f64x2 0 0)) (local.set $a21 (v128.const f64x2 0 0))
            (local.set $a30 (v128.const f64x2 0 0)) (local.set $a31 (v128.const f64x2 0 0))
            ;; row pointers into inp at column 0
            (local.set $p0 (i32.add (local.get $I) (i32.mul (local.get $s0) (local.get $rb))))
            (local.set $p1 (i32.add (local.get $p0) (local.get $rb)))
            (local.set $p2 (i32.add (local.get $p1) (local.get $rb)))
            (local.set $p3 (i32.add (local.get $p2) (local.get $rb)))
            (local.set $mp (i32.add (local.get $M) (i32.shl (i32.mul (local.get $t0) (local.get $tp)) (i32.const 3))))
            (local.set $cend (i32.add (local.get $t0) (i32.const 4)))
            (local.set $c (i32.const 0))
            ;; the cohort count t0 + 4 is a multiple of 4: unrolled by 2, loads splat directly
            (loop $cloop
              (local.set $m0 (v128.load (local.get $mp)))
              (local.set $m1 (v128.load offset=16 (local.get $mp)))
              (local.set $x (v128.load64_splat (local.get $p0)))
              (local.set $a00 (f64x2.add (local.get $a00) (f64x2.mul (local.get $x) (local.get $m0))))
              (local.set $a01 (f64x2.add (local.get $a01) (f64x2.mul (local.get $x) (local.get $m1))))
              (local.set $x (v128.load64_splat (local.get $p1)))
              (local.set $a10 (f64x2.add (local.get $a10) (f64x2.mul (local.get $x) (local.get $m0))))
              (local.set $a11 (f64x2.add (local.get $a11) (f64x2.mul (local.get $x) (local.get $m1))))
              (local.set $x (v128.load64_splat (local.get $p2)))
              (local.set $a20 (f64x2.add (local.get $a20) (f64x2.mul (local.get $x) (local.get $m0))))
              (local.set $a21 (f64x2.add (local.get $a21) (f64x2.mul (local.get $x) (local.get $m1))))
              (local.set $x (v128.load64_splat (local.get $p3)))
              (local.set $a30 (f64x2.add (local.get $a30) (f64x2.mul (local.get $x) (local.get $m0))))
              (local.set $a31 (f64x2.add (local.get $a31) (f64x2.mul (local.get $x) (local.get $m1))))
              (local.set $m0 (v128.load offset=32 (local.get $mp)))
              (local.set $m1 (v128.load offset=48 (local.get $mp)))
              (local.set $x (v128.load64_splat offset=8 (local.get $p0)))
              (local.set $a00 (f64x2.add (local.get $a00) (f64x2.mul (local.get $x) (local.get $m0))))
              (local.set $a01 (f64x2.add (local.get $a01) (f64x2.mul (local.get $x) (local.get $m1))))
              (local.set $x (v128.load64_splat offset=8 (local.get $p1)))
              (local.set $a10 (f64x2.add (local.get $a10) (f64x2.mul (local.get $x) (local.get $m0))))
              (local.set $a11 (f64x2.add (local.get $a11) (f64x2.mul (local.get $x) (local.get $m1))))
              (local.set $x (v128.load64_splat offset=8 (local.get $p2)))
              (local.set $a20 (f64x2.add (local.get $a20) (f64x2.mul (local.get $x) (local.get $m0))))
              (local.set $a21 (f64x2.add (local.get $a21) (f64x2.mul (local.get $x) (local.get $m1))))
              (local.set $x (v128.load64_splat offset=8 (local.get $p3)))
              (local.set $a30 (f64x2.add (local.get $a30) (f64x2.mul (local.get $x) (local.get $m0))))
              (local.set $a31 (f64x2.add (local.get $a31) (f64x2.mul (local.get $x) (local.get $m1))))
              (local.set $p0 (i32.add (local.get $p0) (i32.const 16)))
              (local.set $p1 (i32.add (local.get $p1) (i32.const 16)))
              (local.set $p2 (i32.add (local.get $p2) (i32.const 16)))
              (local.set $p3 (i32.add (local.get $p3) (i32.const 16)))
              (local.set $mp (i32.add (local.get $mp) (i32.const 64)))
              (local.set $c (i32.add (local.get $c) (i32.const 2)))
              (br_if $cloop (i32.lt_u (local.get $c) (local.get $cend))))
            (local.set $o (i32.add (i32.add (local.get $O) (i32.mul (local.get $s0) (local.get $rb))) (i32.shl (local.get $t0) (i32.const 3))))
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
            (v128.store offset=16 (local.get $o) (local.get $a31))
            (local.set $t0 (i32.add (local.get $t0) (i32.const 4)))
            (br $tloop)))
        (local.set $s0 (i32.add (local.get $s0) (i32.const 4)))
        (br $sloop))))


  ;; Inflow-driven model in one call: outflow O = product(I, M) (+ initOut, the initial
  ;; stock's outflow, when initOut ≠ 0), then the balance per series:
  ;;   S[s, t] = S[s, t − 1] + I[s, t] − O[s, t], D[s, t] = S[s, t] − S[s, t − 1], S[s, −1] = stock0[s]
  ;; (stock0 = 0: none). Same layout rules as product.
  (func (export "inflow") (param $I i32) (param $M i32) (param $O i32) (param $S i32) (param $D i32)
        (param $initOut i32) (param $stock0 i32) (param $np i32) (param $tp i32)
    (local $i i32) (local $end i32) (local $s i32) (local $t i32) (local $prev f64) (local $o f64) (local $v f64)
    (call $product (local.get $I) (local.get $M) (local.get $O) (local.get $np) (local.get $tp))
    (local.set $s (i32.const 0))
    (block $sdone
      (loop $sloop
        (br_if $sdone (i32.ge_u (local.get $s) (local.get $np)))
        (local.set $prev (f64.const 0))
        (if (local.get $stock0)
          (then (local.set $prev (f64.load (i32.add (local.get $stock0) (i32.shl (local.get $s) (i32.const 3)))))))
        ;; byte offset of element (s, 0)
        (local.set $i (i32.shl (i32.mul (local.get $s) (local.get $tp)) (i32.const 3)))
        (local.set $end (i32.add (local.get $i) (i32.shl (local.get $tp) (i32.const 3))))
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
        (br $sloop))))

  ;; Stock-driven solve, 4 series at a time (np multiple of 4; rows of length t = T, unpadded):
  ;;   I[s, t] = (Z[s, t] − Σ_{c<t} I[s, c]·St[t, c] − init[s, t]) / St[t, t]
  ;; St is T × T (row = year, column = cohort). init may be 0 (none). clamp ≠ 0 sets negative I to 0.
  ;; A[s, t] receives the achieved stock.
  (func (export "solve") (param $Z i32) (param $St i32) (param $init i32) (param $I i32) (param $A i32)
        (param $np i32) (param $T i32) (param $clamp i32)
    (local $rb i32) (local $s0 i32) (local $t i32) (local $c i32) (local $j i32)
    (local $st i32) (local $r i32) (local $q i32)
    (local $a0 v128) (local $a1 v128) (local $a2 v128) (local $a3 v128) (local $m v128)
    (local $sum f64) (local $d f64) (local $x f64) (local $base f64)
    (local.set $rb (i32.shl (local.get $T) (i32.const 3)))
    (local.set $s0 (i32.const 0))
    (block $sdone
      (loop $sloop
        (br_if $sdone (i32.ge_u (local.get $s0) (local.get $np)))
        (local.set $r (i32.mul (local.get $s0) (local.get $rb)))  ;; byte offset of row s0
        (local.set $t (i32.const 0))
        (block $tdone
          (loop $tloop
            (br_if $tdone (i32.ge_u (local.get $t) (local.get $T)))
            (local.set $a0 (v128.const f64x2 0 0)) (local.set $a1 (v128.const f64x2 0 0))
            (local.set $a2 (v128.const f64x2 0 0)) (local.set $a3 (v128.const f64x2 0 0))
            (local.set $st (i32.add (local.get $St) (i32.mul (local.get $t) (local.get $rb))))
            (local.set $c (i32.const 0))
            (local.set $q (i32.add (local.get $I) (local.get $r)))
            (block $cdone
              (loop $cloop
                (br_if $cdone (i32.gt_u (i32.add (local.get $c) (i32.const 2)) (local.get $t)))
                (local.set $m (v128.load (i32.add (local.get $st) (i32.shl (local.get $c) (i32.const 3)))))
                (local.set $a0 (f64x2.add (local.get $a0) (f64x2.mul (local.get $m) (v128.load (local.get $q)))))
                (local.set $a1 (f64x2.add (local.get $a1) (f64x2.mul (local.get $m) (v128.load (i32.add (local.get $q) (local.get $rb))))))
                (local.set $a2 (f64x2.add (local.get $a2) (f64x2.mul (local.get $m) (v128.load (i32.add (local.get $q) (i32.shl (local.get $rb) (i32.const 1)))))))
                (local.set $a3 (f64x2.add (local.get $a3) (f64x2.mul (local.get $m) (v128.load (i32.add (local.get $q) (i32.mul (local.get $rb) (i32.const 3)))))))
                (local.set $q (i32.add (local.get $q) (i32.const 16)))
                (local.set $c (i32.add (local.get $c) (i32.const 2)))
                (br $cloop)))
            (local.set $d (f64.load (i32.add (local.get $st) (i32.shl (local.get $t) (i32.const 3)))))
            ;; finish each of the 4 series
            (local.set $j (i32.const 0))
            (loop $jloop
              (local.set $sum
                (if (result f64) (i32.eqz (local.get $j))
                  (then (f64.add (f64x2.extract_lane 0 (local.get $a0)) (f64x2.extract_lane 1 (local.get $a0))))
                  (else (if (result f64) (i32.eq (local.get $j) (i32.const 1))
                    (then (f64.add (f64x2.extract_lane 0 (local.get $a1)) (f64x2.extract_lane 1 (local.get $a1))))
                    (else (if (result f64) (i32.eq (local.get $j) (i32.const 2))
                      (then (f64.add (f64x2.extract_lane 0 (local.get $a2)) (f64x2.extract_lane 1 (local.get $a2))))
                      (else (f64.add (f64x2.extract_lane 0 (local.get $a3)) (f64x2.extract_lane 1 (local.get $a3))))))))))
              ;; q: byte offset of row s0 + j
              (local.set $q (i32.add (local.get $r) (i32.mul (local.get $j) (local.get $rb))))
              ;; odd tail: c == t − 1
              (if (i32.lt_u (local.get $c) (local.get $t))
                (then (local.set $sum (f64.add (local.get $sum)
                  (f64.mul (f64.load (i32.add (i32.add (local.get $I) (local.get $q)) (i32.shl (local.get $c) (i32.const 3))))
                           (f64.load (i32.add (local.get $st) (i32.shl (local.get $c) (i32.const 3)))))))))
              (local.set $base (local.get $sum))
              (if (local.get $init)
                (then (local.set $base (f64.add (local.get $base)
                  (f64.load (i32.add (i32.add (local.get $init) (local.get $q)) (i32.shl (local.get $t) (i32.const 3))))))))
              (local.set $x (f64.div (f64.sub (f64.load (i32.add (i32.add (local.get $Z) (local.get $q)) (i32.shl (local.get $t) (i32.const 3))))
                                              (local.get $base)) (local.get $d)))
              (if (i32.and (i32.ne (local.get $clamp) (i32.const 0)) (f64.lt (local.get $x) (f64.const 0)))
                (then (local.set $x (f64.const 0))))
              (f64.store (i32.add (i32.add (local.get $I) (local.get $q)) (i32.shl (local.get $t) (i32.const 3))) (local.get $x))
              (f64.store (i32.add (i32.add (local.get $A) (local.get $q)) (i32.shl (local.get $t) (i32.const 3)))
                         (f64.add (local.get $base) (f64.mul (local.get $x) (local.get $d))))
              (local.set $j (i32.add (local.get $j) (i32.const 1)))
              (br_if $jloop (i32.lt_u (local.get $j) (i32.const 4))))
            (local.set $t (i32.add (local.get $t) (i32.const 1)))
            (br $tloop)))
        (local.set $s0 (i32.add (local.get $s0) (i32.const 4)))
        (br $sloop))))
)
