//! Subject-level checks against the intended anatomy (the internal parameters are visible
//! here, so each labelled volume is compared with the volume of the shape it was drawn from).

use super::*;
use crate::anatomy::label;
use crate::shapes::Tube;

/// Voxel volume in ml (1 ml = 1000 mm³).
fn voxel_ml(p: &PhantomParams) -> f64 {
    p.spacing.iter().product::<f64>() / 1000.0
}

fn label_ml(s: &Subject, p: &PhantomParams, l: u16) -> f64 {
    s.labels.as_slice().iter().filter(|&&v| v == l).count() as f64 * voxel_ml(p)
}

/// `Σ π r² L` over the parts of the pieces with z inside `[z0, z1]` (mm³); each piece's
/// length is cut in proportion to its z overlap (the vessels run mostly along z).
fn tube_volume_in_slab(t: &Tube, z0: f64, z1: f64) -> f64 {
    t.segments
        .iter()
        .map(|s| {
            let (za, zb) = (s.a[2], s.a[2] + s.ab[2]);
            let (lo, hi) = (za.min(zb), za.max(zb));
            let frac = if hi > lo { ((hi.min(z1) - lo.max(z0)) / (hi - lo)).clamp(0.0, 1.0) } else { 1.0 };
            std::f64::consts::PI * s.radius * s.radius * s.length() * frac
        })
        .sum()
}

#[test]
fn organ_volumes_follow_their_shape_formulas() {
    // Intended volumes: ellipsoid (4/3)·π·a·b·c, here with the taper factor (1 + τ²/5)
    // derived in `Blob`; tubes Σ π r² L (cylinder volume). Both textbook formulas.
    // Tolerances: the shape wobble and the smooth deformation change volumes by a few %, and
    // organs lose the parts owned by higher-priority structures (the liver's kidney
    // impression, the IVC running through it, the muscle wall), so the labelled volume is
    // bounded above tightly and below loosely. Kidneys have the highest priority of the
    // blobs and must match within 10 %.
    let p = PhantomParams::small();
    let fov = p.grid();
    let (z0, z1) = (fov.corners_world()[0][2] - 2.0, fov.corners_world()[7][2] + 2.0);
    for s in 0..5 {
        let d = draws(7, s, 1.0);
        let subj = generate(7, s, &p);
        for (l, blob) in d.anatomy.blobs() {
            let got = label_ml(&subj, &p, l);
            let want = blob.volume_mm3() / 1000.0;
            let lo = if l == label::KIDNEY_LEFT || l == label::KIDNEY_RIGHT { 0.9 } else { 0.6 };
            assert!(got > lo * want && got < 1.1 * want, "subject {s} label {l}: {got:.0} ml vs shape {want:.0} ml");
        }
        for (l, tube) in [(label::AORTA, &d.anatomy.aorta), (label::IVC, &d.anatomy.ivc)] {
            let got = label_ml(&subj, &p, l);
            let want = tube_volume_in_slab(tube, z0, z1) / 1000.0;
            assert!(got > 0.8 * want && got < 1.15 * want, "subject {s} label {l}: {got:.0} ml vs tube {want:.0} ml");
        }
        // Spine: at least the vertebral bodies (elliptic cylinders π·a·b·h), at most that plus
        // the arches (which are smaller than the bodies here).
        let got = label_ml(&subj, &p, label::SPINE);
        let want = d.anatomy.spine.body_volume_mm3(z0, z1) / 1000.0;
        assert!(got > 0.95 * want && got < 2.0 * want, "subject {s} spine: {got:.0} ml vs bodies {want:.0} ml");
    }
}

#[test]
fn organ_volumes_are_adult_like() {
    // Normal adult ranges (ml), from memory of radiology reference values (liver about
    // 1.0–1.8 L), widened below because the phantom is a slim adult whose 240-mm-wide body
    // must fit the 288-mm field of view: liver 0.6–2.0 L, spleen 100–350, each kidney 110–250,
    // stomach (contents included) 80–500, bowel 0.5–2.5 L.
    let p = PhantomParams::small();
    let ranges = [
        (label::LIVER, 600.0, 2000.0),
        (label::SPLEEN, 90.0, 350.0),
        (label::KIDNEY_RIGHT, 100.0, 250.0),
        (label::KIDNEY_LEFT, 100.0, 250.0),
        (label::STOMACH, 80.0, 500.0),
        (label::BOWEL, 500.0, 2500.0),
    ];
    for s in 0..6 {
        let subj = generate(11, s, &p);
        for (l, lo, hi) in ranges {
            let v = label_ml(&subj, &p, l);
            assert!(v > lo && v < hi, "subject {s} label {l}: {v:.0} ml not in [{lo}, {hi}]");
        }
    }
}

#[test]
fn aorta_has_an_adult_calibre() {
    // Abdominal aorta diameter about 20–30 mm in adults (from memory). Measure the area of the
    // aorta label in axial slices above the bifurcation: d = 2·√(A/π).
    let p = PhantomParams::default();
    let subj = generate(7, 0, &p);
    let [nx, ny, nz] = p.shape;
    for k in [nz / 2, 3 * nz / 4] {
        let mut n = 0usize;
        for i in 0..nx {
            for j in 0..ny {
                n += (subj.labels.data[[i, j, k]] == label::AORTA) as usize;
            }
        }
        let area = n as f64 * p.spacing[0] * p.spacing[1];
        let dia = 2.0 * (area / std::f64::consts::PI).sqrt();
        assert!((20.0..30.0).contains(&dia), "slice {k}: aorta diameter {dia:.1} mm");
    }
}

#[test]
fn body_fits_in_the_field_of_view() {
    // The side faces (i and j extremes) show air only: the body is entirely inside the
    // 288 × 224 mm cross-section.
    let p = PhantomParams::small();
    let [nx, ny, nz] = p.shape;
    for s in 0..8 {
        let subj = generate(3, s, &p);
        for k in 0..nz {
            for j in 0..ny {
                assert_eq!(subj.labels.data[[0, j, k]], 0);
                assert_eq!(subj.labels.data[[nx - 1, j, k]], 0);
            }
            for i in 0..nx {
                assert_eq!(subj.labels.data[[i, 0, k]], 0);
                assert_eq!(subj.labels.data[[i, ny - 1, k]], 0);
            }
        }
    }
}
