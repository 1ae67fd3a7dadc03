//! 3 × 3 matrices for building test affines.

/// The rotation by `deg` degrees about axis `axis` (0, 1 or 2), right-handed: with `(p, q)`
/// the other two axes in cyclic order, `R[p][p] = R[q][q] = cos θ`, `R[p][q] = −sin θ`,
/// `R[q][p] = sin θ`, `R[axis][axis] = 1`.
pub fn rotation(axis: usize, deg: f64) -> [[f64; 3]; 3] {
    let (s, c) = deg.to_radians().sin_cos();
    let (p, q) = ((axis + 1) % 3, (axis + 2) % 3);
    let mut r = [[0.0; 3]; 3];
    r[axis][axis] = 1.0;
    r[p][p] = c;
    r[q][q] = c;
    r[p][q] = -s;
    r[q][p] = s;
    r
}

/// The matrix product `a · b`: `(a·b)[i][j] = Σ_k a[i][k]·b[k][j]`.
pub fn matmul3(a: [[f64; 3]; 3], b: [[f64; 3]; 3]) -> [[f64; 3]; 3] {
    let mut c = [[0.0; 3]; 3];
    for i in 0..3 {
        for j in 0..3 {
            c[i][j] = (0..3).map(|k| a[i][k] * b[k][j]).sum();
        }
    }
    c
}
