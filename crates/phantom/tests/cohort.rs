//! Public-API checks of the demo cohort: determinism, labels, intensities, variation, grids.

use sinew_phantom::{cohort, generate, PhantomParams, Subject, LABELS};

fn small() -> PhantomParams {
    PhantomParams::small()
}

/// Centroid (world mm) and voxel count of label `l`.
fn centroid(s: &Subject, l: u16) -> ([f64; 3], usize) {
    let mut sum = [0.0; 3];
    let mut n = 0usize;
    for ((i, j, k), &v) in s.labels.data.indexed_iter() {
        if v == l {
            let w = s.labels.grid.voxel_to_world([i as f64, j as f64, k as f64]);
            for d in 0..3 {
                sum[d] += w[d];
            }
            n += 1;
        }
    }
    (sum.map(|v| v / n.max(1) as f64), n)
}

fn dist(a: [f64; 3], b: [f64; 3]) -> f64 {
    ((a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2) + (a[2] - b[2]).powi(2)).sqrt()
}

#[test]
fn same_seed_gives_identical_subjects_for_any_thread_count() {
    let p = small();
    let a = generate(7, 2, &p);
    let one = rayon::ThreadPoolBuilder::new().num_threads(1).build().unwrap();
    let b = one.install(|| generate(7, 2, &p));
    // bit-identical, compared as raw bits (NaN-safe, -0.0-safe)
    assert!(a.image.as_slice().iter().zip(b.image.as_slice()).all(|(x, y)| x.to_bits() == y.to_bits()));
    assert_eq!(a.labels.data, b.labels.data);
    assert_eq!(a.id, "subject_02");
    let c = generate(8, 2, &p);
    assert_ne!(a.labels.data, c.labels.data);
    let d = generate(7, 3, &p);
    assert_ne!(a.labels.data, d.labels.data);
}

#[test]
fn cohort_equals_generate_in_a_loop_and_subject_zero_is_stable() {
    let p = small();
    let three = cohort(5, 3, &p);
    assert_eq!(three.len(), 3);
    for (i, s) in three.iter().enumerate() {
        let g = generate(5, i, &p);
        assert_eq!(s.labels.data, g.labels.data);
        assert_eq!(s.image.data, g.image.data);
        assert_eq!(s.id, format!("subject_{i:02}"));
    }
    let one = cohort(5, 1, &p);
    assert_eq!(one[0].image.data, three[0].image.data);
}

#[test]
fn label_table_is_consistent() {
    assert_eq!(LABELS.len(), 10);
    for (n, (v, name)) in LABELS.iter().enumerate() {
        assert_eq!(*v as usize, n + 1);
        assert!(!name.is_empty());
    }
}

#[test]
fn every_label_is_present_and_organs_lie_inside_the_body() {
    let p = small();
    for s in cohort(21, 4, &p) {
        let present = s.labels.labels();
        assert_eq!(present, (1..=10).collect::<Vec<u16>>(), "{}", s.id);
        // No organ voxel (labels 1–9) touches air (label 0) across a face: organs are wrapped
        // in body tissue.
        let [nx, ny, nz] = p.shape;
        let l = &s.labels.data;
        for ((i, j, k), &v) in l.indexed_iter() {
            if v == 0 || v == 10 {
                continue;
            }
            let nb = [
                (i.wrapping_sub(1), j, k),
                (i + 1, j, k),
                (i, j.wrapping_sub(1), k),
                (i, j + 1, k),
                (i, j, k.wrapping_sub(1)),
                (i, j, k + 1),
            ];
            for (a, b, c) in nb {
                if a < nx && b < ny && c < nz {
                    assert_ne!(l[[a, b, c]], 0, "{}: label {v} at {:?} touches air", s.id, (i, j, k));
                }
            }
        }
    }
}

#[test]
fn intensities_are_ct_like() {
    let p = PhantomParams::default();
    let s = generate(7, 1, &p);
    assert_eq!(s.image.count_non_finite(), 0);
    let (lo, hi) = s.image.finite_range().unwrap();
    // air −1000 and cortical bone ~1000 HU, plus bias (≤ 8 HU) and noise (12 HU, < 6σ here)
    assert!(lo > -1100.0 && hi < 1250.0, "range {lo} .. {hi}");
    // Mean HU per label, within the intended value ± subject jitter ± bias/texture (HU
    // values from memory of contrast CT: liver ~60, spleen ~50, kidney 25–35, aorta ~150,
    // IVC ~120, air −1000).
    let expect: [(u16, f64, f64); 7] = [
        (0, -1010.0, -990.0),
        (1, 50.0, 70.0),
        (2, 40.0, 60.0),
        (3, 15.0, 45.0),
        (4, 15.0, 45.0),
        (6, 130.0, 170.0),
        (7, 100.0, 140.0),
    ];
    for (l, a, b) in expect {
        let (sum, n) = s
            .labels
            .as_slice()
            .iter()
            .zip(s.image.as_slice())
            .filter(|(&v, _)| v == l)
            .fold((0.0f64, 0usize), |(acc, n), (_, &h)| (acc + h as f64, n + 1));
        let mean = sum / n as f64;
        assert!(mean > a && mean < b, "label {l}: mean {mean:.1} HU not in [{a}, {b}]");
    }
    // Spine: cortical shell 1000 HU around 300 HU cancellous bone: mean well above soft tissue.
    let spine: Vec<f32> =
        s.labels.as_slice().iter().zip(s.image.as_slice()).filter(|(&v, _)| v == 8).map(|(_, &h)| h).collect();
    let m = spine.iter().map(|&v| v as f64).sum::<f64>() / spine.len() as f64;
    assert!(m > 300.0 && m < 900.0, "spine mean {m}");
}

#[test]
fn noise_has_the_requested_standard_deviation() {
    // In air far from the body the image is −1000 + bias + noise, the bias varying over
    // hundreds of mm. For neighbours along k, Var(x₁ − x₂) = 2σ² for independent noise of
    // variance σ² (exact fact), so σ̂ = √(mean((x₁ − x₂)²)/2).
    let p = PhantomParams::default();
    let s = generate(7, 0, &p);
    let [_, ny, nz] = p.shape;
    let mut acc = 0.0f64;
    let mut n = 0usize;
    for i in [0usize, 1, 2] {
        for j in 0..ny {
            for k in 0..nz - 1 {
                if s.labels.data[[i, j, k]] == 0 && s.labels.data[[i, j, k + 1]] == 0 {
                    let d = (s.image.data[[i, j, k]] - s.image.data[[i, j, k + 1]]) as f64;
                    acc += d * d;
                    n += 1;
                }
            }
        }
    }
    let sigma = (acc / n as f64 / 2.0).sqrt();
    // n ≈ 64 000 pairs: relative standard error of σ̂ about 1/√(2n) ≈ 0.3 %
    assert!(approx::abs_diff_eq!(sigma, 12.0, epsilon = 0.3), "noise σ {sigma:.2} from {n} pairs");
}

#[test]
fn subjects_differ_like_patients() {
    // Organ centres move by ~1–3 cm between subjects (jitter up to ±10 mm per axis, breathing
    // ±10 mm, body scale ±12 %); the body's width varies by up to ±12 %.
    let p = small();
    let subjects = cohort(7, 6, &p);
    for l in [1u16, 2, 3, 4] {
        let c: Vec<[f64; 3]> = subjects.iter().map(|s| centroid(s, l).0).collect();
        let mut shifts = Vec::new();
        for a in 0..c.len() {
            for b in a + 1..c.len() {
                shifts.push(dist(c[a], c[b]));
            }
        }
        let mean = shifts.iter().sum::<f64>() / shifts.len() as f64;
        let max = shifts.iter().cloned().fold(0.0, f64::max);
        assert!(mean > 5.0 && mean < 35.0 && max < 70.0, "label {l}: mean shift {mean:.1} mm, max {max:.1} mm");
    }
    // body width at mid-height: count of body columns along i in the central row
    let widths: Vec<f64> = subjects
        .iter()
        .map(|s| {
            let [nx, ny, nz] = p.shape;
            let mut w = 0;
            for i in 0..nx {
                w += (s.labels.data[[i, ny / 2, nz / 2]] != 0) as usize;
            }
            w as f64 * p.spacing[0]
        })
        .collect();
    let lo = widths.iter().cloned().fold(f64::INFINITY, f64::min);
    let hi = widths.iter().cloned().fold(0.0, f64::max);
    assert!(hi / lo > 1.03 && hi / lo < 1.4, "body widths {widths:?}");
    assert!(lo > 180.0 && hi < 288.0, "body widths {widths:?}");
}

#[test]
fn small_grid_covers_the_default_field_of_view() {
    let (d, s) = (PhantomParams::default(), small());
    let (gd, gs) = (d.grid(), s.grid());
    for axis in 0..3 {
        // field of view = n · spacing, centred on 0: first voxel corner at −n·spacing/2
        let fov_d = d.shape[axis] as f64 * d.spacing[axis];
        let fov_s = s.shape[axis] as f64 * s.spacing[axis];
        assert_eq!(fov_d, fov_s);
        let corner_d = gd.voxel_to_world([-0.5; 3])[axis];
        let corner_s = gs.voxel_to_world([-0.5; 3])[axis];
        approx::assert_abs_diff_eq!(corner_d, -fov_d / 2.0, epsilon = 1e-9);
        approx::assert_abs_diff_eq!(corner_s, -fov_s / 2.0, epsilon = 1e-9);
    }
    assert_eq!(gd.orientation(), "RAS");
    assert_eq!([d.shape, s.shape], [[144, 112, 192], [72, 56, 96]]);
    // The same subject at both resolutions: organ volumes and centroids agree.
    let (a, b) = (generate(7, 0, &d), generate(7, 0, &s));
    for l in [1u16, 2, 3, 4] {
        let ((ca, na), (cb, nb)) = (centroid(&a, l), centroid(&b, l));
        let (va, vb) = (na as f64 * 8.0, nb as f64 * 64.0);
        assert!(approx::abs_diff_eq!(va / vb, 1.0, epsilon = 0.1), "label {l}: {va} vs {vb} mm³");
        assert!(dist(ca, cb) < 2.0, "label {l}: centroids {ca:?} vs {cb:?}");
    }
}
