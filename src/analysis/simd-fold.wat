;; The block fold of ShiftedMoments.addBlock for four vectors, two coordinates at a time in
;; WebAssembly SIMD (f64x2). Compiled by scripts/build-kernel.mjs into simd-fold-bytes.ts.
;;
;; fold4(a, b, c, e, ref, s1, end, sign) reads four float32 vectors at byte offsets a, b, c, e and the
;; float64 reference and sums at ref and s1, and for coordinates j = 0, 2, 4, … below end (rounded down
;; to even) adds sign·Σ_k (v_k[j] − ref[j]) to s1[j]. It stops before the first pair whose sum is NaN or
;; infinite and returns the coordinate it stopped at; the caller finishes the rest (an odd last
;; coordinate, or the pair that was not finite) in JavaScript. The globals y and q hold, for the
;; coordinates done, Σ (v_k − ref)² and Σ (v_{k+1} − v_k)² over the three consecutive pairs.
;; Every operation is the scalar one of the JavaScript loop, in the same order per lane, so the sums
;; of s1 are identical; y and q add the two lanes' partial sums at the end (a different order).
(module
  (memory (export "memory") 1)
  (global $y (export "y") (mut f64) (f64.const 0))
  (global $q (export "q") (mut f64) (f64.const 0))
  (func (export "fold4") (param $a i32) (param $b i32) (param $c i32) (param $e i32)
        (param $ref i32) (param $s1 i32) (param $end i32) (param $sign f64) (result i32)
    (local $j i32) (local $stop i32) (local $o4 i32) (local $o8 i32)
    (local $r v128) (local $d1 v128) (local $d2 v128) (local $d3 v128) (local $d4 v128)
    (local $x v128) (local $u v128) (local $yv v128) (local $qv v128) (local $sg v128)
    (local.set $sg (f64x2.splat (local.get $sign)))
    (local.set $stop (i32.and (local.get $end) (i32.const -2)))
    (block $done
      (loop $next
        (br_if $done (i32.ge_u (local.get $j) (local.get $stop)))
        (local.set $o4 (i32.shl (local.get $j) (i32.const 2)))
        (local.set $o8 (i32.shl (local.get $j) (i32.const 3)))
        (local.set $r (v128.load (i32.add (local.get $ref) (local.get $o8))))
        (local.set $d1 (f64x2.sub (f64x2.promote_low_f32x4 (v128.load64_zero (i32.add (local.get $a) (local.get $o4)))) (local.get $r)))
        (local.set $d2 (f64x2.sub (f64x2.promote_low_f32x4 (v128.load64_zero (i32.add (local.get $b) (local.get $o4)))) (local.get $r)))
        (local.set $d3 (f64x2.sub (f64x2.promote_low_f32x4 (v128.load64_zero (i32.add (local.get $c) (local.get $o4)))) (local.get $r)))
        (local.set $d4 (f64x2.sub (f64x2.promote_low_f32x4 (v128.load64_zero (i32.add (local.get $e) (local.get $o4)))) (local.get $r)))
        (local.set $x (f64x2.add (f64x2.add (f64x2.add (local.get $d1) (local.get $d2)) (local.get $d3)) (local.get $d4)))
        ;; x − x is 0 for finite x and NaN for NaN or ±Infinity: any bad value makes its lane bad.
        (br_if $done (v128.any_true (f64x2.ne (f64x2.sub (local.get $x) (local.get $x)) (f64x2.splat (f64.const 0)))))
        (v128.store (i32.add (local.get $s1) (local.get $o8))
          (f64x2.add (v128.load (i32.add (local.get $s1) (local.get $o8))) (f64x2.mul (local.get $sg) (local.get $x))))
        (local.set $yv (f64x2.add (local.get $yv)
          (f64x2.add
            (f64x2.add (f64x2.add (f64x2.mul (local.get $d1) (local.get $d1)) (f64x2.mul (local.get $d2) (local.get $d2)))
                       (f64x2.mul (local.get $d3) (local.get $d3)))
            (f64x2.mul (local.get $d4) (local.get $d4)))))
        (local.set $u (f64x2.sub (local.get $d2) (local.get $d1)))
        (local.set $x (f64x2.mul (local.get $u) (local.get $u)))
        (local.set $u (f64x2.sub (local.get $d3) (local.get $d2)))
        (local.set $x (f64x2.add (local.get $x) (f64x2.mul (local.get $u) (local.get $u))))
        (local.set $u (f64x2.sub (local.get $d4) (local.get $d3)))
        (local.set $qv (f64x2.add (local.get $qv) (f64x2.add (local.get $x) (f64x2.mul (local.get $u) (local.get $u)))))
        (local.set $j (i32.add (local.get $j) (i32.const 2)))
        (br $next)))
    (global.set $y (f64.add (f64x2.extract_lane 0 (local.get $yv)) (f64x2.extract_lane 1 (local.get $yv))))
    (global.set $q (f64.add (f64x2.extract_lane 0 (local.get $qv)) (f64x2.extract_lane 1 (local.get $qv))))
    (local.get $j))
)
