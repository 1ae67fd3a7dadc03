//! The qform (quaternion) form of an affine, through the public API.

use sinew_grid::Affine;
use sinew_io::{affine_to_qform, qform_affine};
use sinew_testkit::{matmul3, rotation};

#[test]
fn qform_round_trips_rotations_and_flips() {
    // Exact math: a rigid affine (rotation · diag(spacing), optionally mirrored) is
    // reproduced by its own qform.
    for (ax, deg) in [(0, 0.0), (2, 30.0), (1, 179.0), (0, -120.0), (2, 180.0), (1, 90.0)] {
        for flip in [1.0, -1.0] {
            let r = matmul3(rotation(ax, deg), rotation((ax + 1) % 3, 17.0));
            let s = [0.7, 1.3, 2.5];
            let mut lin = [[0.0; 3]; 3];
            for i in 0..3 {
                for j in 0..3 {
                    lin[i][j] = r[i][j] * s[j] * if j == 2 { flip } else { 1.0 };
                }
            }
            let a = Affine::from_parts(lin, [3.0, -4.0, 5.0]);
            let (q, sp, qfac, off) = affine_to_qform(&a);
            assert_eq!(qfac, flip);
            let back = qform_affine(q, sp, qfac, off);
            for (x, y) in back.m.iter().flatten().zip(a.m.iter().flatten()) {
                assert!(approx::abs_diff_eq!(x, y, epsilon = 1e-12), "{ax} {deg} {flip}: {back:?} vs {a:?}");
            }
        }
    }
}
