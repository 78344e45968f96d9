//! Region boxes and membership at extreme scales, checked in exact rational arithmetic
//! (tests/common, num-rational):
//! - the directed sums are the tightest doubles on their side of the exact sum;
//! - the outer box is rounded outward and the inner box inward, each as tight as possible;
//! - `contains` agrees with the exact test for L-inf on points around the boundary, never accepts an
//!   outside point for L2, and refuses a point one unit in the last place outside;
//! - `project` always gives a point inside exactly, for centres and radii from 1e-8 to 1e8;
//! - attack counterexamples lie inside exactly and report a distance ≤ epsilon.

mod common;

use ballast::attack::{attack_sample, AttackOutcome, AttackSettings};
use ballast::model::{Dense, Network};
use ballast::threat::{exact, Budget, Norm, Region};
use common::{ball_inside, in_range, l2_scaled_sum, rational};
use nalgebra::{DMatrix, DVector};
use num_traits::Signed;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// 10^U(−8, 8) with a random sign.
fn extreme(rng: &mut ChaCha8Rng) -> f64 {
    let v = 10f64.powf(rng.gen_range(-8.0..8.0));
    if rng.gen::<bool>() {
        -v
    } else {
        v
    }
}

fn norm_name(norm: Norm) -> &'static str {
    match norm {
        Norm::Linf => "linf",
        Norm::L2 => "l2",
    }
}

/// A random region: centres and radii at scales 1e-8..1e8 (some features fixed), the input range
/// unbounded or cutting into the ball.
fn random_region(rng: &mut ChaCha8Rng, norm: Norm) -> (Region, Vec<f64>, Vec<f64>) {
    let dim = if rng.gen_bool(0.1) {
        rng.gen_range(20..60)
    } else {
        rng.gen_range(1..6)
    };
    let center: Vec<f64> = (0..dim).map(|_| extreme(rng)).collect();
    let radii: Vec<f64> = (0..dim)
        .map(|_| {
            if rng.gen_bool(0.1) {
                0.0
            } else {
                extreme(rng).abs()
            }
        })
        .collect();
    let bounded = rng.gen_bool(0.5);
    let (mut lower, mut upper) = (vec![f64::NEG_INFINITY; dim], vec![f64::INFINITY; dim]);
    if bounded {
        for i in 0..dim {
            lower[i] = center[i] - radii[i] * rng.gen_range(0.0..2.0);
            upper[i] = center[i] + radii[i] * rng.gen_range(0.0..2.0);
        }
    }
    let budget = Budget { norm, radii };
    let region = budget.region(&center, &lower, &upper);
    (region, lower, upper)
}

fn exactly_inside(region: &Region, lower: &[f64], upper: &[f64], x: &[f64]) -> bool {
    in_range(x, lower, upper)
        && ball_inside(norm_name(region.norm), x, &region.center, &region.radii)
}

#[test]
fn directed_sums_are_the_tightest_doubles_around_the_exact_sum() {
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    for _ in 0..20_000 {
        let (a, b) = (extreme(&mut rng), extreme(&mut rng));
        let sum = rational(a) + rational(b);
        let down = exact::add_down(a, b);
        let up = exact::add_up(a, b);
        assert!(
            rational(down) <= sum && rational(down.next_up()) > sum,
            "{a} + {b}"
        );
        assert!(
            rational(up) >= sum && rational(up.next_down()) < sum,
            "{a} + {b}"
        );
        let x = if rng.gen::<bool>() { down } else { up };
        for k in [-1i32, 0, 1] {
            let v = match k {
                -1 => x.next_down(),
                1 => x.next_up(),
                _ => x,
            };
            let r = b.abs();
            let truth = (rational(v) - rational(a)).abs() <= rational(r);
            assert_eq!(exact::within(v, a, r), truth, "|{v} − {a}| ≤ {r}");
        }
    }
}

#[test]
fn the_boxes_are_rounded_outward_and_inward_as_tightly_as_possible() {
    let mut rng = ChaCha8Rng::seed_from_u64(2);
    for _ in 0..3_000 {
        let (region, lower, upper) = random_region(&mut rng, Norm::Linf);
        for i in 0..region.dim() {
            let (c, r) = (rational(region.center[i]), rational(region.radii[i]));
            let (low_end, high_end) = (&c - &r, &c + &r);
            // Outer: below c − r (or at the range), and nothing between it and c − r is left out.
            let lo = region.outer_lower[i];
            assert!(rational(lo) <= low_end || lo == lower[i]);
            assert!(rational(lo.next_up()) > low_end || lo == lower[i]);
            let hi = region.outer_upper[i];
            assert!(rational(hi) >= high_end || hi == upper[i]);
            assert!(rational(hi.next_down()) < high_end || hi == upper[i]);
            // Inner: the first and last doubles inside.
            let lo = region.inner_lower[i];
            assert!(rational(lo) >= low_end && lo >= lower[i]);
            assert!(rational(lo.next_down()) < low_end || lo == lower[i]);
            let hi = region.inner_upper[i];
            assert!(rational(hi) <= high_end && hi <= upper[i]);
            assert!(rational(hi.next_up()) > high_end || hi == upper[i]);
        }
    }
}

#[test]
fn contains_is_exact_for_linf_and_never_accepts_outside_points_for_l2() {
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let mut refused_inside_l2 = 0;
    for norm in [Norm::Linf, Norm::L2] {
        for _ in 0..3_000 {
            let (region, lower, upper) = random_region(&mut rng, norm);
            // Points around the boundary: one feature at an inner-box end moved by −2..=2 units in the
            // last place, the others at the centre or (L-inf) at random box points.
            for _ in 0..10 {
                let mut x = region.center.clone();
                if norm == Norm::Linf {
                    for (i, v) in x.iter_mut().enumerate() {
                        let (lo, hi) = (region.inner_lower[i], region.inner_upper[i]);
                        if rng.gen::<bool>() && hi > lo {
                            *v = rng.gen_range(lo..=hi);
                        }
                    }
                }
                let i = rng.gen_range(0..region.dim());
                let mut v = if rng.gen::<bool>() {
                    region.inner_lower[i]
                } else {
                    region.inner_upper[i]
                };
                for _ in 0..rng.gen_range(0..=2) {
                    v = if rng.gen::<bool>() {
                        v.next_up()
                    } else {
                        v.next_down()
                    };
                }
                x[i] = v;
                let truth = exactly_inside(&region, &lower, &upper, &x);
                let said = region.contains(&x);
                match norm {
                    Norm::Linf => assert_eq!(said, truth, "{region:?} at {x:?}"),
                    Norm::L2 => {
                        assert!(
                            !said || truth,
                            "accepted an outside point {x:?} of {region:?}"
                        );
                        if truth && !said {
                            // Refused only on the sphere's rounding-error margin.
                            let sum = l2_scaled_sum(&x, &region.center, &region.radii).unwrap();
                            assert!(sum > rational(1.0 - 1e-12), "refused {x:?} of {region:?}");
                            refused_inside_l2 += 1;
                        }
                    }
                }
            }
        }
    }
    // The boundary points sit on the sphere up to rounding, so some are refused; none further in.
    assert!(refused_inside_l2 > 0);
}

#[test]
fn one_unit_in_the_last_place_outside_is_refused() {
    let mut rng = ChaCha8Rng::seed_from_u64(4);
    for norm in [Norm::Linf, Norm::L2] {
        for _ in 0..5_000 {
            let (c, r) = (extreme(&mut rng), extreme(&mut rng).abs());
            let unbounded = [f64::NEG_INFINITY];
            let region = Budget::uniform(norm, r, 1).region(&[c], &unbounded, &[f64::INFINITY]);
            let (lo, hi) = (region.inner_lower[0], region.inner_upper[0]);
            for (inside, outside) in [(hi, hi.next_up()), (lo, lo.next_down())] {
                assert!(ball_inside(norm_name(norm), &[inside], &[c], &[r]));
                assert!(!ball_inside(norm_name(norm), &[outside], &[c], &[r]));
                assert!(
                    !region.contains(&[outside]),
                    "{norm} c {c} r {r}: {outside}"
                );
                if norm == Norm::Linf {
                    assert!(region.contains(&[inside]), "c {c} r {r}: {inside}");
                }
            }
        }
    }
}

#[test]
fn projected_points_always_pass_and_lie_inside_exactly() {
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    for norm in [Norm::Linf, Norm::L2] {
        for _ in 0..2_000 {
            let (region, lower, upper) = random_region(&mut rng, norm);
            for _ in 0..5 {
                // Far outside, just outside and inside, in the radii's units.
                let spread = [3.0, 1.0 + 1e-12, 1.0, 0.5][rng.gen_range(0..4)];
                let mut x: Vec<f64> = region
                    .center
                    .iter()
                    .zip(&region.radii)
                    .map(|(c, r)| c + r * spread * rng.gen_range(-1.0..1.0))
                    .collect();
                if rng.gen_bool(0.3) {
                    let i = rng.gen_range(0..x.len());
                    x[i] = region.center[i] + region.radii[i] * spread;
                }
                region.project(&mut x);
                assert!(region.contains(&x), "{norm}: {x:?} of {region:?}");
                assert!(
                    exactly_inside(&region, &lower, &upper, &x),
                    "{norm}: {x:?} of {region:?}"
                );
                let largest = region.radii.iter().copied().fold(0.0, f64::max);
                assert!(region.distance(&x) <= largest);
            }
        }
    }
}

/// A two-class linear model `(0, w·x + b)`: class 1 when `w·x + b > 0`.
fn linear(w: &[f64], b: f64) -> Network {
    let mut weights = DMatrix::zeros(2, w.len());
    for (j, v) in w.iter().enumerate() {
        weights[(1, j)] = *v;
    }
    Network::from_dense(vec![Dense {
        weights,
        bias: DVector::from_vec(vec![0.0, b]),
    }])
}

#[test]
fn attack_counterexamples_lie_inside_and_within_epsilon() {
    // Budgets just above the exact flipping distance |w·c + b| / ‖w‖_dual (Hölder's inequality; common
    // practice), so the counterexample sits on the ball's edge where rounding decides.
    let mut rng = ChaCha8Rng::seed_from_u64(6);
    let settings = AttackSettings::default();
    let mut found = 0;
    for norm in [Norm::Linf, Norm::L2] {
        for case in 0..300 {
            let dim = rng.gen_range(1..6);
            let w: Vec<f64> = (0..dim).map(|_| rng.gen_range(-2.0..2.0)).collect();
            let scale = 10f64.powf(rng.gen_range(-3.0..3.0));
            let center: Vec<f64> = (0..dim).map(|_| scale * rng.gen_range(-1.0..1.0)).collect();
            let z: f64 = w.iter().zip(&center).map(|(a, b)| a * b).sum();
            let b = scale * 0.1 - z; // the centre has logit 0.1 · scale: class 1
            let dual = match norm {
                Norm::Linf => w.iter().map(|v| v.abs()).sum::<f64>(),
                Norm::L2 => w.iter().map(|v| v * v).sum::<f64>().sqrt(),
            };
            let epsilon = scale * 0.1 / dual * (1.0 + 1e-7);
            let region = Budget::uniform(norm, epsilon, dim).region(
                &center,
                &vec![f64::NEG_INFINITY; dim],
                &vec![f64::INFINITY; dim],
            );
            let network = linear(&w, b);
            let outcome = attack_sample(&network, &region, 1, &[0], &settings, case, &[]).unwrap();
            if let AttackOutcome::Found(c) = outcome {
                found += 1;
                assert!(ball_inside(
                    norm_name(norm),
                    &c.input,
                    &center,
                    &region.radii
                ));
                assert!(c.distance <= epsilon, "{norm}: {} > {epsilon}", c.distance);
            }
        }
    }
    assert!(found >= 400, "only {found} of 600 found");
}
