//! Every faer entry point of `linalg` leaves the upper halves of the vector
//! registers clear, on the calling thread and, for a call from outside the
//! rayon pool, on every pool thread: faer's AVX/AVX-512 kernels return without
//! `vzeroupper`, and on Intel CPUs every legacy-SSE instruction after them
//! then pays a transition penalty (see `linalg::clear_vector_upper`; 27× on
//! an `exp` on this project's Xeon).
//!
//! The clearing between faer calls inside `models::shifted` is not seen from
//! here (those calls are private); the fit bench measures it.
//!
//! One test alone in its binary: the global pool's threads are shared by
//! every test of a binary, and another test's product in flight would
//! dirty them between the call and the check.

#![allow(clippy::unwrap_used, clippy::expect_used)]

#[cfg(target_arch = "x86_64")]
mod x86 {
    use faer::{Accum, MatMut, MatRef, Par};
    use ndarray::{Array2, s};
    use plumbline::linalg;
    use rand::{Rng, SeedableRng};
    use rand_xoshiro::Xoshiro256PlusPlus;

    fn random(rows: usize, cols: usize, seed: u64) -> Array2<f64> {
        let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
        Array2::from_shape_fn((rows, cols), |_| rng.gen_range(-1.0..1.0))
    }

    /// Whether the upper halves of this thread's vector registers are in
    /// use: bit 2 (the YMM_Hi128 state component) of XINUSE, which XGETBV
    /// reads with ECX = 1 where CPUID leaf 0Dh, sub-leaf 1, sets EAX bit 2
    /// (Intel SDM vol. 1, ch. 13, "Managing State Using the XSAVE Feature
    /// Set"; the bit numbers from memory). `None` where the CPU cannot say.
    fn upper_in_use() -> Option<bool> {
        use std::arch::x86_64::{__cpuid_count, _xgetbv};
        if !std::arch::is_x86_feature_detected!("avx")
            || !std::arch::is_x86_feature_detected!("xsave")
        {
            return None;
        }
        #[allow(unused_unsafe)]
        // SAFETY: CPUID exists on every x86_64 CPU.
        let leaf = unsafe { __cpuid_count(0xD, 1) };
        if leaf.eax & (1 << 2) == 0 {
            return None;
        }
        #[target_feature(enable = "xsave")]
        fn xinuse() -> u64 {
            // SAFETY: XGETBV with ECX = 1 is supported, checked above.
            unsafe { _xgetbv(1) }
        }
        // SAFETY: the CPU has XSAVE, checked above.
        Some(unsafe { xinuse() } & (1 << 2) != 0)
    }

    fn every_pool_thread_clear(after: &str) {
        let states: Vec<Option<bool>> = rayon::broadcast(|_| upper_in_use());
        assert!(
            states.iter().all(|s| *s == Some(false)),
            "after {after}, per pool thread: {states:?}"
        );
    }

    #[test]
    fn faer_calls_leave_the_vector_registers_clear() {
        let Some(_) = upper_in_use() else {
            eprintln!("this CPU cannot report the vector register state; nothing to check");
            return;
        };
        let a = random(300, 200, 1);
        let b = random(200, 300, 2);

        // The control: faer alone. Where its kernels leave the state dirty,
        // the check is shown able to see it.
        let (sa, sb) = (a.as_standard_layout(), b.as_standard_layout());
        let mut out = vec![0.0; 300 * 300];
        faer::linalg::matmul::matmul(
            MatMut::from_column_major_slice_mut(&mut out, 300, 300),
            Accum::Replace,
            MatRef::from_row_major_slice(sb.as_slice().unwrap(), 200, 300).transpose(),
            MatRef::from_row_major_slice(sa.as_slice().unwrap(), 300, 200).transpose(),
            1.0,
            Par::Seq,
        );
        let faer_dirty = upper_in_use() == Some(true);
        eprintln!("faer's product alone leaves the upper halves in use: {faer_dirty}");

        // Each result is checked while alive: freeing it may run glibc code
        // that clears the registers itself. 200 · 200 · 150 multiply-adds
        // stay under the sharing threshold (16.8 million): one core, the
        // calling thread, as in ridge serving.
        let (small_a, small_b) = (random(200, 150, 6), random(150, 200, 7));
        let product = linalg::matmul(small_a.view(), small_b.view());
        assert_eq!(upper_in_use(), Some(false), "after a one-core product");
        let gram = linalg::matmul_t(small_a.view(), small_a.view());
        assert_eq!(upper_in_use(), Some(false), "after a one-core product");
        let one_row = linalg::matmul(small_a.slice(s![..1, ..]), small_b.view());
        assert_eq!(upper_in_use(), Some(false), "after a one-row product");
        let eigen = linalg::sym_eigen(gram.view()).unwrap();
        assert_eq!(upper_in_use(), Some(false), "after an eigendecomposition");
        every_pool_thread_clear("an eigendecomposition");

        // Kernel blocks run on the pool, a one-core product each.
        let train = random(5000, 200, 3);
        let c = random(5000, 2, 4);
        let kernel = linalg::rbf_kernel_times(
            a.view(),
            train.view(),
            &linalg::row_sq_norms(train.view()),
            0.005,
            c.view(),
        );
        assert_eq!(upper_in_use(), Some(false), "after kernel blocks");
        every_pool_thread_clear("kernel blocks");

        // 600³ multiply-adds pass the sharing threshold (16.8 million).
        let big = random(600, 600, 5);
        let shared = linalg::matmul(big.view(), big.view());
        assert_eq!(upper_in_use(), Some(false), "after a shared product");
        every_pool_thread_clear("a shared product");

        let rows = linalg::sq_dists(big.slice(s![..100, ..]), big.view(), None);
        assert_eq!(upper_in_use(), Some(false), "after distances");
        drop((out, product, one_row, eigen, kernel, shared, rows));
    }
}
