;; The block fold of ShiftedMoments.addBlock for four vectors, two coordinates at a time in
;; WebAssembly SIMD (f64x2), over several vectors laid end to end in one call. Compiled by
;; scripts/build-kernel.mjs into simd-fold-bytes.ts.
;;
;; fold4(a, b, c, e, ref, s1, ends, count, out, sign) reads four float32 regions at byte offsets a, b,
;; c, e and the float64 reference and sums at ref and s1, all indexed by the same coordinate. The
;; coordinates are cut into `count` segments (one per vector) by the int32 table at `ends`: segment i
;; runs from the previous end (0 for the first) to ends[i], which must be even. For every coordinate j
;; it adds sign·Σ_k (v_k[j] − ref[j]) to s1[j], unless that sum is NaN or infinite: such a coordinate
;; is left as it was (a lane mask, no branch), so calling again with the opposite sign takes back
;; exactly what was added. Per segment it stores at out[2i] Σ (v_k − ref)² and at out[2i+1]
;; Σ (v_{k+1} − v_k)² over the three consecutive pairs; both are NaN or infinite when any value of
;; the segment is, which is how the caller tells a block to refuse.
;; Every operation on s1 is the scalar one of the JavaScript loop, in the same order per lane, so its
;; sums are identical; the two sums of squares add the two lanes' partial sums at the end (a
;; different order).
;;
;; The memory is the caller's, made to the arena's size (SimdFold).
(module
  (import "env" "memory" (memory 1 65536))
  (func (export "fold4") (param $a i32) (param $b i32) (param $c i32) (param $e i32)
        (param $ref i32) (param $s1 i32) (param $ends i32) (param $count i32) (param $out i32)
        (param $sign f64)
    (local $j i32) (local $seg i32) (local $stop i32) (local $o4 i32) (local $o8 i32)
    (local $r v128) (local $d1 v128) (local $d2 v128) (local $d3 v128) (local $d4 v128)
    (local $x v128) (local $u v128) (local $yv v128) (local $qv v128) (local $sg v128)
    (local.set $sg (f64x2.splat (local.get $sign)))
    (block $segments_done
      (loop $segment
        (br_if $segments_done (i32.ge_u (local.get $seg) (local.get $count)))
        (local.set $stop (i32.load (i32.add (local.get $ends) (i32.shl (local.get $seg) (i32.const 2)))))
        (local.set $yv (v128.const i64x2 0 0))
        (local.set $qv (v128.const i64x2 0 0))
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
            ;; x − x is 0 for finite x and NaN for NaN or ±Infinity: the mask keeps the finite lanes of x.
            (local.set $x (v128.and (local.get $x)
              (f64x2.eq (f64x2.sub (local.get $x) (local.get $x)) (v128.const i64x2 0 0))))
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
        (f64.store (i32.add (local.get $out) (i32.shl (local.get $seg) (i32.const 4)))
          (f64.add (f64x2.extract_lane 0 (local.get $yv)) (f64x2.extract_lane 1 (local.get $yv))))
        (f64.store (i32.add (local.get $out) (i32.add (i32.shl (local.get $seg) (i32.const 4)) (i32.const 8)))
          (f64.add (f64x2.extract_lane 0 (local.get $qv)) (f64x2.extract_lane 1 (local.get $qv))))
        (local.set $seg (i32.add (local.get $seg) (i32.const 1)))
        (br $segment))))
)
