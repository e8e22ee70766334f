//! Benchmark, engine stage: single-row (generation) throughput of the repacked int8
//! kernels, as gigabytes of weight streamed per second, for the weight shapes of the
//! default judge.
//!
//! Input: none (weights are pseudo-random, quantised with candle). Output: GB/s and
//! rows/s per format on stdout. Never asserts on time. One row per call is
//! memory-bound, so compare the numbers with the machine's streaming bandwidth.
//!
//! The kernel family is the one the engine would use (`ASSIZE_KERNELS=avx2` and the
//! like cap it, so one machine can measure each family it runs).
//!
//! usage: cargo bench --bench kernels [-- [THREADS] [--in-cache]]

use std::hint::black_box;
use std::time::Instant;

use assize::engine::kernels::{Kernels, Packed};
use candle_core::quantized::{GgmlDType, QTensor};
use candle_core::{Device, Tensor};

fn values(n: usize, seed: u64) -> Vec<f32> {
    let mut s = seed | 1;
    (0..n)
        .map(|_| {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            (s >> 40) as f32 / (1u64 << 24) as f32 * 2.0 - 1.0
        })
        .collect()
}

fn main() {
    if let Some(t) = std::env::args()
        .nth(1)
        .filter(|a| a.parse::<usize>().is_ok())
    {
        std::env::set_var("CANDLE_NUM_THREADS", &t);
        std::env::set_var("RAYON_NUM_THREADS", &t);
    }
    let Some(kernels) = Kernels::active() else {
        println!("ASSIZE_KERNELS=candle: the repacked kernels are not used");
        return;
    };
    let in_cache = std::env::args().any(|a| a == "--in-cache");
    let threads = candle_core::utils::barrier_pool().n_workers() + 1;
    println!("threads {threads}, kernels {}", kernels.isa());
    // (format, n, k): attention output, ffn up/gate and down of the 1.5B judge; the
    // 0.5B judge's ffn up/gate in its Q8_0 and Q5_0 forms.
    for (dtype, n, k) in [
        (GgmlDType::Q4K, 1536, 1536),
        (GgmlDType::Q4K, 8960, 1536),
        (GgmlDType::Q6K, 1536, 8960),
        (GgmlDType::Q8_0, 4864, 896),
        (GgmlDType::Q5_0, 4864, 896),
    ] {
        // In-cache runs use an eighth of the rows, about 1 MB of tiles (fits in L2).
        let n = if in_cache { n / 8 } else { n };
        let t = Tensor::from_vec(values(n * k, 7), (n, k), &Device::Cpu).expect("tensor");
        let qt = QTensor::quantize(&t, dtype).expect("quantize");
        // Enough copies to overflow the last-level cache (~600 MB of tiles); one copy
        // with `--in-cache`, to see the kernel's arithmetic rate instead of memory's.
        let pack = || Packed::new(&qt, kernels).expect("pack").expect("covered");
        let one = pack().bytes();
        let copies = if in_cache { 1 } else { (600 << 20) / one + 1 };
        let packed: Vec<Packed> = (0..copies)
            .map(|_| pack())
            .collect();
        let x = values(k, 11);
        for p in &packed {
            black_box(p.forward(&x, 1));
        }
        let rounds = if in_cache { 2000 } else { 5 };
        let start = Instant::now();
        for _ in 0..rounds {
            for p in &packed {
                black_box(p.forward(black_box(&x), 1));
            }
        }
        let secs = start.elapsed().as_secs_f64();
        let calls = (rounds * copies) as f64;
        println!(
            "{dtype:?} {n}x{k}: {:.1} GB/s, {:.0} µs per call, {:.2} bits per weight",
            calls * one as f64 / secs / 1e9,
            secs / calls * 1e6,
            one as f64 * 8.0 / (n * k) as f64
        );
    }
}
