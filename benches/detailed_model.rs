//! One simulated second of the detailed full-converter model through a fault, at its native
//! step (RK4, 50 µs). Throughput is reported in "elements" = simulated seconds, so criterion's
//! elem/s reads as simulated seconds per wall-clock second.

use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use understudy::runtime::ode::{integrate, Method};
use understudy::runtime::unit::full_converter::{FullConverter, FullConverterParams};
use understudy::runtime::unit::{Disturbance, GridEquivalent, OperatingPoint};

fn one_second_through_a_fault(c: &mut Criterion) {
    let mut group = c.benchmark_group("detailed full-converter");
    group.throughput(Throughput::Elements(1));
    group.sample_size(20);
    group.bench_function("1 s with a 150 ms fault (RK4, 50 µs)", |b| {
        b.iter(|| {
            let (mut unit, mut x) = FullConverter::initialise(
                FullConverterParams::default(),
                &OperatingPoint::new(0.9, 0.0),
                &GridEquivalent {
                    scr: 5.0,
                    x_over_r: 10.0,
                },
                &Disturbance::Fault {
                    start_s: 0.1,
                    duration_s: 0.15,
                    retained_voltage: 0.2,
                },
            )
            .unwrap();
            let bp = unit.breakpoints_s();
            let mut last = 0.0;
            integrate(
                &mut unit,
                &mut x,
                0.0,
                1.0,
                1e-3,
                &bp,
                &Method::Rk4 { step_s: 5e-5 },
                |_, x, _| last = x[0],
            )
            .unwrap();
            last
        })
    });
    group.finish();
}

criterion_group!(benches, one_second_through_a_fault);
criterion_main!(benches);
