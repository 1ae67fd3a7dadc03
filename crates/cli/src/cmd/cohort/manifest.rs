//! The subjects of a cohort (manifest or folder), their pairs and the shards of those pairs.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context};
use serde::Deserialize;

/// One subject: a scan with its label map and optional mask and landmarks.
#[derive(Clone, Debug, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Subject {
    /// Identifier (letters, digits, `-`, `_`, `.`; no `__`): names the pair folders.
    pub id: String,
    /// The scan (NIfTI).
    pub image: PathBuf,
    /// Its label map (NIfTI, same grid).
    pub labels: PathBuf,
    /// Optional mask on its grid (used when the subject is the fixed one).
    #[serde(default)]
    pub mask: Option<PathBuf>,
    /// Optional landmarks: CSV of x,y,z in world mm, corresponding by row across subjects.
    #[serde(default)]
    pub landmarks: Option<PathBuf>,
}

/// One pair: `fixed` = subject `i`, `moving` = subject `j`, `i < j`; `index` counts pairs in
/// the order (0,1), (0,2), …, (0,n−1), (1,2), ….
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Pair {
    /// Position in the list of all pairs.
    pub index: usize,
    /// Fixed subject (position in the subject list).
    pub fixed: usize,
    /// Moving subject.
    pub moving: usize,
}

/// All pairs `i < j` of `n` subjects, in index order (`n·(n−1)/2` of them).
pub fn all_pairs(n: usize) -> Vec<Pair> {
    let mut v = Vec::with_capacity(n * n.saturating_sub(1) / 2);
    for i in 0..n {
        for j in i + 1..n {
            v.push(Pair { index: v.len(), fixed: i, moving: j });
        }
    }
    v
}

/// A share `K/N` of the pairs: those with `index mod N == K − 1`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Shard {
    /// 1-based share number.
    pub k: usize,
    /// Number of shares.
    pub n: usize,
}

impl std::str::FromStr for Shard {
    type Err = String;
    fn from_str(s: &str) -> Result<Shard, String> {
        let (k, n) = s.split_once('/').ok_or_else(|| format!("{s:?}: expected K/N, e.g. 2/8"))?;
        let k: usize = k.trim().parse().map_err(|_| format!("{s:?}: K is not a whole number"))?;
        let n: usize = n.trim().parse().map_err(|_| format!("{s:?}: N is not a whole number"))?;
        if n == 0 || k == 0 || k > n {
            return Err(format!("{s:?}: need 1 ≤ K ≤ N"));
        }
        Ok(Shard { k, n })
    }
}

impl Shard {
    /// True when pair `index` belongs to this share.
    pub fn contains(&self, index: usize) -> bool {
        index % self.n == self.k - 1
    }
}

/// Checks an identifier for use in folder names.
fn check_id(id: &str, origin: &Path) -> anyhow::Result<()> {
    let ok = !id.is_empty()
        && !id.contains("__")
        && !id.starts_with('.')
        && id.chars().all(|c| c.is_ascii_alphanumeric() || "-_.".contains(c));
    if !ok {
        bail!(
            "{}: subject id {id:?} must be letters, digits, '-', '_' or '.', not start with '.', and not contain '__'",
            origin.display()
        );
    }
    Ok(())
}

/// The subjects of a manifest: TOML (`[[subject]]` tables with `id`, `image`, `labels`, and
/// optional `mask`, `landmarks`) or CSV (header naming the columns `id,image,labels` and
/// optionally `mask,landmarks`; empty cells for missing files). Relative paths are taken from
/// the manifest's folder.
pub fn read_manifest(path: &Path) -> anyhow::Result<Vec<Subject>> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("{}: cannot read the manifest", path.display()))?;
    let is_toml = path.extension().is_some_and(|e| e.eq_ignore_ascii_case("toml"));
    let mut subjects = if is_toml { parse_toml(&text, path)? } else { parse_csv(&text, path)? };
    let base = path.parent().unwrap_or(Path::new(""));
    for s in &mut subjects {
        for p in [Some(&mut s.image), Some(&mut s.labels), s.mask.as_mut(), s.landmarks.as_mut()].into_iter().flatten()
        {
            if p.is_relative() {
                *p = base.join(&*p);
            }
        }
    }
    check_subjects(&subjects, path)?;
    Ok(subjects)
}

fn parse_toml(text: &str, path: &Path) -> anyhow::Result<Vec<Subject>> {
    #[derive(Deserialize)]
    #[serde(deny_unknown_fields)]
    struct Manifest {
        subject: Vec<Subject>,
    }
    let m: Manifest = toml::from_str(text)
        .map_err(|e| anyhow::anyhow!("{}: {}", path.display(), e.message().replace('\n', " ")))
        .context("expected [[subject]] tables with id, image, labels and optional mask, landmarks")?;
    Ok(m.subject)
}

fn parse_csv(text: &str, path: &Path) -> anyhow::Result<Vec<Subject>> {
    let mut lines = text.lines().enumerate().filter(|(_, l)| !l.trim().is_empty() && !l.trim_start().starts_with('#'));
    let (_, header) = lines.next().with_context(|| format!("{}: empty manifest", path.display()))?;
    let cols: Vec<String> = header.split(',').map(|c| c.trim().to_ascii_lowercase()).collect();
    let find = |name: &str| cols.iter().position(|c| c == name);
    let (Some(id), Some(image), Some(labels)) = (find("id"), find("image"), find("labels")) else {
        bail!(
            "{}: the header must name the columns id, image, labels (and optionally mask, landmarks)",
            path.display()
        );
    };
    for c in &cols {
        if !["id", "image", "labels", "mask", "landmarks"].contains(&c.as_str()) {
            bail!("{}: unknown column {c:?} (known: id, image, labels, mask, landmarks)", path.display());
        }
    }
    let (mask, landmarks) = (find("mask"), find("landmarks"));
    lines
        .map(|(n, line)| {
            let cells: Vec<&str> = line.split(',').map(str::trim).collect();
            if cells.len() != cols.len() {
                bail!("{}:{}: {} cells, the header has {}", path.display(), n + 1, cells.len(), cols.len());
            }
            let opt = |c: Option<usize>| c.map(|c| cells[c]).filter(|s| !s.is_empty()).map(PathBuf::from);
            Ok(Subject {
                id: cells[id].to_string(),
                image: PathBuf::from(cells[image]),
                labels: PathBuf::from(cells[labels]),
                mask: opt(mask),
                landmarks: opt(landmarks),
            })
        })
        .collect()
}

fn check_subjects(subjects: &[Subject], origin: &Path) -> anyhow::Result<()> {
    if subjects.len() < 2 {
        bail!("{}: {} subject(s); a cohort needs at least two", origin.display(), subjects.len());
    }
    for (n, s) in subjects.iter().enumerate() {
        check_id(&s.id, origin)?;
        if subjects[..n].iter().any(|t| t.id == s.id) {
            bail!("{}: subject id {:?} appears twice", origin.display(), s.id);
        }
    }
    Ok(())
}

/// The subjects of a folder: every `<id>_image.nii.gz` with a matching `<id>_labels.nii.gz`
/// (the layout `sinew demo` writes), sorted by id. An image without labels is an error.
pub fn scan_folder(dir: &Path) -> anyhow::Result<Vec<Subject>> {
    let entries = std::fs::read_dir(dir).with_context(|| format!("{}: cannot list the folder", dir.display()))?;
    let mut subjects = Vec::new();
    for e in entries {
        let name = e.with_context(|| format!("{}: cannot list the folder", dir.display()))?.file_name();
        let Some(id) = name.to_str().and_then(|n| n.strip_suffix("_image.nii.gz")) else { continue };
        let labels = dir.join(format!("{id}_labels.nii.gz"));
        if !labels.exists() {
            bail!("{}: {} has no label map {}", dir.display(), name.to_string_lossy(), labels.display());
        }
        subjects.push(Subject { id: id.to_string(), image: dir.join(&name), labels, mask: None, landmarks: None });
    }
    subjects.sort_by(|a, b| a.id.cmp(&b.id));
    check_subjects(&subjects, dir)?;
    Ok(subjects)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shards_partition_the_pairs() {
        // Exact counting: every pair lands in exactly one of the N shares, for N = 1..=7.
        for subjects in [2, 3, 5, 10] {
            let pairs = all_pairs(subjects);
            assert_eq!(pairs.len(), subjects * (subjects - 1) / 2);
            for n in 1..=7 {
                let mut seen = vec![0; pairs.len()];
                for k in 1..=n {
                    let shard: Shard = format!("{k}/{n}").parse().unwrap();
                    pairs.iter().filter(|p| shard.contains(p.index)).for_each(|p| seen[p.index] += 1);
                }
                assert!(seen.iter().all(|&c| c == 1), "{subjects} subjects, N = {n}: {seen:?}");
            }
        }
        for bad in ["0/3", "4/3", "1/0", "2", "a/b"] {
            assert!(bad.parse::<Shard>().is_err(), "{bad}");
        }
    }

    #[test]
    fn manifests_in_both_formats() {
        let dir = tempfile::tempdir().unwrap();
        let toml_path = dir.path().join("m.toml");
        std::fs::write(
            &toml_path,
            "[[subject]]\nid = \"a\"\nimage = \"a.nii.gz\"\nlabels = \"/x/a_l.nii.gz\"\nmask = \"am.nii.gz\"\n\n\
             [[subject]]\nid = \"b\"\nimage = \"b.nii.gz\"\nlabels = \"b_l.nii.gz\"\n",
        )
        .unwrap();
        let t = read_manifest(&toml_path).unwrap();
        assert_eq!(t[0].image, dir.path().join("a.nii.gz"));
        assert_eq!(t[0].labels, PathBuf::from("/x/a_l.nii.gz"));
        assert_eq!(t[0].mask, Some(dir.path().join("am.nii.gz")));
        assert_eq!(t[1].mask, None);
        let csv_path = dir.path().join("m.csv");
        std::fs::write(&csv_path, "id,image,labels,mask\na,a.nii.gz,/x/a_l.nii.gz,am.nii.gz\nb,b.nii.gz,b_l.nii.gz,\n")
            .unwrap();
        assert_eq!(read_manifest(&csv_path).unwrap(), t);
        std::fs::write(&csv_path, "id,image,labels\na,a.nii.gz,al.nii.gz\na,b.nii.gz,bl.nii.gz\n").unwrap();
        assert!(read_manifest(&csv_path).unwrap_err().to_string().contains("twice"));
        std::fs::write(&csv_path, "id,image,labels\na__b,a.nii.gz,al.nii.gz\nc,b.nii.gz,bl.nii.gz\n").unwrap();
        assert!(read_manifest(&csv_path).is_err());
    }
}
