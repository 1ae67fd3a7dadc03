//! The subjects of a cohort (manifest or folder), their pairs and the shards of those pairs.

use std::path::{Path, PathBuf};

use crate::{Context, Result};
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

/// One pair: `fixed` and `moving` are subject positions; `index` counts pairs in the order
/// of a pair list, or for all pairs `i < j` in the order (0,1), (0,2), …, (0,n−1), (1,2), ….
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
fn check_id(id: &str, origin: &Path) -> Result<()> {
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

/// The subjects of a manifest, and its pairs when it lists them: TOML (`[[subject]]` tables
/// with `id`, `image`, `labels`, and optional `mask`, `landmarks`; optional `[[pair]]` tables
/// with `fixed`, `moving`) or CSV (header naming the columns `id,image,labels` and
/// optionally `mask,landmarks`; empty cells for missing files). Relative paths are taken from
/// the manifest's folder.
pub fn read_manifest(path: &Path) -> Result<(Vec<Subject>, Option<Vec<NamedPair>>)> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("{}: cannot read the manifest", path.display()))?;
    parse_manifest(&text, path)
}

/// [`read_manifest`] of a manifest held in memory: `path` names it in errors, its extension
/// chooses the format and its folder is where relative paths are taken from.
pub fn parse_manifest(text: &str, path: &Path) -> Result<(Vec<Subject>, Option<Vec<NamedPair>>)> {
    let is_toml = path.extension().is_some_and(|e| e.eq_ignore_ascii_case("toml"));
    let (mut subjects, pairs) = if is_toml { parse_toml(text, path)? } else { (parse_csv(text, path)?, None) };
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
    Ok((subjects, pairs))
}

/// A pair named by subject ids, as a pair list or a manifest's `[[pair]]` table gives it.
#[derive(Clone, Debug, PartialEq, Eq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NamedPair {
    /// Fixed subject id.
    pub fixed: String,
    /// Moving subject id.
    pub moving: String,
}

fn parse_toml(text: &str, path: &Path) -> Result<(Vec<Subject>, Option<Vec<NamedPair>>)> {
    #[derive(Deserialize)]
    #[serde(deny_unknown_fields)]
    struct Manifest {
        subject: Vec<Subject>,
        #[serde(default)]
        pair: Option<Vec<NamedPair>>,
    }
    // The expectation first, then the file and the parser's message (one line).
    let m: Manifest = toml::from_str(text).map_err(|e| {
        crate::CohortError::Invalid(format!(
            "expected [[subject]] tables with id, image, labels and optional mask, landmarks, and optional \
             [[pair]] tables with fixed, moving: {}: {}",
            path.display(),
            e.message().replace('\n', " ")
        ))
    })?;
    Ok((m.subject, m.pair))
}

/// The 1-based line of `text` on which the CSV record at `pos` starts, for a reader whose
/// comment character is `comment`. The csv crate's own position of a record that follows
/// blank lines or comments is where those lines begin (csv 1.3, measured: `"1,2,3\n\n4,5,6"`
/// puts the second record on line 2), so the count starts there and passes over line breaks
/// and comment lines first.
pub(crate) fn record_line(text: &[u8], pos: Option<&csv::Position>, comment: Option<u8>) -> u64 {
    let mut at = pos.map_or(0, |p| p.byte() as usize).min(text.len());
    loop {
        while at < text.len() && matches!(text[at], b'\n' | b'\r') {
            at += 1;
        }
        if comment.is_none() || text.get(at) != comment.as_ref() {
            break;
        }
        at = text[at..].iter().position(|&b| b == b'\n').map_or(text.len(), |i| at + i);
    }
    text[..at].iter().filter(|&&b| b == b'\n').count() as u64 + 1
}

/// One CSV record: its line number and its cells.
pub type Record = (u64, Vec<String>);

/// Reads a CSV table through the `csv` crate: a header row, then records; lines starting with
/// `#` and blank lines are skipped, cells are trimmed, quoted cells may hold commas and
/// newlines (RFC 4180). Returns the lower-cased header and the records with their line numbers.
pub fn read_table(text: &str, path: &Path) -> Result<(Vec<String>, Vec<Record>)> {
    let mut rdr =
        csv::ReaderBuilder::new().comment(Some(b'#')).trim(csv::Trim::All).flexible(true).from_reader(text.as_bytes());
    let header: Vec<String> = rdr
        .headers()
        .with_context(|| format!("{}: not a CSV table", path.display()))?
        .iter()
        .map(|c| c.to_ascii_lowercase())
        .collect();
    if header.iter().all(|c| c.is_empty()) {
        bail!("{}: empty table (expected a header line)", path.display());
    }
    let mut records = Vec::new();
    for r in rdr.records() {
        let r = r.with_context(|| format!("{}: not a CSV table", path.display()))?;
        let line = record_line(text.as_bytes(), r.position(), Some(b'#'));
        if r.iter().all(str::is_empty) {
            continue;
        }
        if r.len() != header.len() {
            bail!("{}:{line}: {} cells, the header has {}", path.display(), r.len(), header.len());
        }
        records.push((line, r.iter().map(str::to_string).collect()));
    }
    Ok((header, records))
}

fn parse_csv(text: &str, path: &Path) -> Result<Vec<Subject>> {
    let (cols, records) = read_table(text, path)?;
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
    Ok(records
        .into_iter()
        .map(|(_, cells)| {
            let opt = |c: Option<usize>| c.map(|c| cells[c].as_str()).filter(|s| !s.is_empty()).map(PathBuf::from);
            Subject {
                id: cells[id].clone(),
                image: PathBuf::from(&cells[image]),
                labels: PathBuf::from(&cells[labels]),
                mask: opt(mask),
                landmarks: opt(landmarks),
            }
        })
        .collect())
}

/// Reads a pair list: CSV with the columns `fixed,moving` (subject ids; a header line naming
/// them first, other columns refused), one pair a line, in the order the pairs get their index.
pub fn read_pair_list(path: &Path) -> Result<Vec<NamedPair>> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("{}: cannot read the pair list", path.display()))?;
    parse_pair_list(&text, path)
}

/// [`read_pair_list`] of a list held in memory; `path` names it in errors.
pub fn parse_pair_list(text: &str, path: &Path) -> Result<Vec<NamedPair>> {
    let (cols, records) = read_table(text, path)?;
    if cols != ["fixed", "moving"] {
        bail!("{}: the header must be fixed,moving (subject ids), found {:?}", path.display(), cols.join(","));
    }
    Ok(records.into_iter().map(|(_, c)| NamedPair { fixed: c[0].clone(), moving: c[1].clone() }).collect())
}

/// The pairs of a pair list, by subject position, in list order (index = position in the
/// list). Unknown ids, a subject paired with itself and a pair listed twice are errors
/// (the reverse pair is a different pair).
pub fn resolve_pairs(named: &[NamedPair], subjects: &[Subject], origin: &Path) -> Result<Vec<Pair>> {
    if named.is_empty() {
        bail!("{}: the pair list is empty", origin.display());
    }
    let pos = |id: &str| {
        subjects
            .iter()
            .position(|s| s.id == id)
            .with_context(|| format!("{}: pair names subject {id:?}, which is not in the cohort", origin.display()))
    };
    let mut pairs: Vec<Pair> = Vec::with_capacity(named.len());
    for (index, p) in named.iter().enumerate() {
        let (fixed, moving) = (pos(&p.fixed)?, pos(&p.moving)?);
        if fixed == moving {
            bail!("{}: pair {} pairs subject {:?} with itself", origin.display(), index + 1, p.fixed);
        }
        if pairs.iter().any(|q| q.fixed == fixed && q.moving == moving) {
            bail!("{}: pair {:?} → {:?} is listed twice", origin.display(), p.fixed, p.moving);
        }
        pairs.push(Pair { index, fixed, moving });
    }
    Ok(pairs)
}

fn check_subjects(subjects: &[Subject], origin: &Path) -> Result<()> {
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
pub fn scan_folder(dir: &Path) -> Result<Vec<Subject>> {
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

/// Where a cohort's subjects and pairs come from: a manifest or a folder in the layout
/// `sinew demo` writes, and optionally a pair list.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Source {
    /// A manifest (TOML or CSV), see [`read_manifest`].
    pub manifest: Option<PathBuf>,
    /// A folder of `<id>_image.nii.gz` + `<id>_labels.nii.gz` files, see [`scan_folder`]
    /// (used when there is no manifest).
    pub all_pairs: Option<PathBuf>,
    /// A pair list, see [`read_pair_list`] (not together with a manifest's `[[pair]]` tables).
    pub pairs: Option<PathBuf>,
}

/// A cohort's subjects and every pair to run.
#[derive(Clone, Debug, PartialEq)]
pub struct Cohort {
    /// The subjects.
    pub subjects: Vec<Subject>,
    /// The pairs: those of the pair list or the manifest's `[[pair]]` tables in list order,
    /// else every pair `i < j`.
    pub pairs: Vec<Pair>,
    /// The manifest's folder or the subjects' folder (where `labels.json` is looked for).
    pub dir: PathBuf,
}

impl Source {
    /// Reads the subjects and resolves the pairs.
    pub fn load(&self) -> Result<Cohort> {
        let (subjects, listed, dir) = match (&self.manifest, &self.all_pairs) {
            (Some(m), _) => {
                let (subjects, listed) = read_manifest(m)?;
                (subjects, listed.map(|l| (l, m.clone())), m.parent().unwrap_or(Path::new(".")).to_path_buf())
            }
            (None, Some(d)) => (scan_folder(d)?, None, d.clone()),
            (None, None) => bail!("give --manifest FILE or --all-pairs DIR"),
        };
        let listed = match (&self.pairs, listed) {
            (Some(p), Some((_, m))) => {
                bail!("{}: lists [[pair]] tables and --pairs {} was given too; keep one", m.display(), p.display())
            }
            (Some(p), None) => Some((read_pair_list(p)?, p.clone())),
            (None, l) => l,
        };
        let pairs = match &listed {
            Some((named, origin)) => resolve_pairs(named, &subjects, origin)?,
            None => all_pairs(subjects.len()),
        };
        Ok(Cohort { subjects, pairs, dir })
    }
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
        let (t, pairs) = read_manifest(&toml_path).unwrap();
        assert_eq!(pairs, None);
        assert_eq!(t[0].image, dir.path().join("a.nii.gz"));
        assert_eq!(t[0].labels, PathBuf::from("/x/a_l.nii.gz"));
        assert_eq!(t[0].mask, Some(dir.path().join("am.nii.gz")));
        assert_eq!(t[1].mask, None);
        let csv_path = dir.path().join("m.csv");
        std::fs::write(&csv_path, "id,image,labels,mask\na,a.nii.gz,/x/a_l.nii.gz,am.nii.gz\nb,b.nii.gz,b_l.nii.gz,\n")
            .unwrap();
        assert_eq!(read_manifest(&csv_path).unwrap().0, t);
        std::fs::write(&csv_path, "id,image,labels\na,a.nii.gz,al.nii.gz\na,b.nii.gz,bl.nii.gz\n").unwrap();
        assert!(read_manifest(&csv_path).unwrap_err().to_string().contains("twice"));
        std::fs::write(&csv_path, "id,image,labels\na__b,a.nii.gz,al.nii.gz\nc,b.nii.gz,bl.nii.gz\n").unwrap();
        assert!(read_manifest(&csv_path).is_err());
    }

    #[test]
    fn pair_lists_from_csv_and_toml() {
        let dir = tempfile::tempdir().unwrap();
        let m = dir.path().join("m.toml");
        std::fs::write(
            &m,
            "[[subject]]\nid = \"a\"\nimage = \"a.nii.gz\"\nlabels = \"al.nii.gz\"\n\
             [[subject]]\nid = \"b\"\nimage = \"b.nii.gz\"\nlabels = \"bl.nii.gz\"\n\
             [[subject]]\nid = \"c\"\nimage = \"c.nii.gz\"\nlabels = \"cl.nii.gz\"\n\
             [[pair]]\nfixed = \"c\"\nmoving = \"a\"\n[[pair]]\nfixed = \"a\"\nmoving = \"c\"\n",
        )
        .unwrap();
        let (subjects, named) = read_manifest(&m).unwrap();
        let pairs = resolve_pairs(&named.unwrap(), &subjects, &m).unwrap();
        // Both directions of one pair, in list order.
        assert_eq!(pairs, vec![Pair { index: 0, fixed: 2, moving: 0 }, Pair { index: 1, fixed: 0, moving: 2 }]);
        let list = dir.path().join("pairs.csv");
        std::fs::write(&list, "# test pairs\nfixed, moving\nb,a\n\nc,b\n").unwrap();
        let named = read_pair_list(&list).unwrap();
        assert_eq!(resolve_pairs(&named, &subjects, &list).unwrap()[1], Pair { index: 1, fixed: 2, moving: 1 });
        for (text, says) in [
            ("fixed,moving\nb,x\n", "\"x\""),
            ("fixed,moving\nb,b\n", "itself"),
            ("fixed,moving\na,b\na,b\n", "twice"),
            ("moving,fixed\na,b\n", "header"),
            ("fixed,moving\na,b,c\n", "3 cells"),
            ("fixed,moving\n", "empty"),
        ] {
            std::fs::write(&list, text).unwrap();
            let e = read_pair_list(&list).and_then(|n| resolve_pairs(&n, &subjects, &list)).unwrap_err().to_string();
            assert!(e.contains(says) && e.contains("pairs.csv"), "{text:?}: {e}");
        }
    }

    #[test]
    fn the_readme_examples_parse() {
        let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../examples");
        let (subjects, pairs) = read_manifest(&root.join("cohort.toml")).unwrap();
        assert_eq!(subjects.len(), 2);
        assert_eq!(subjects[0].landmarks, Some(root.join("scans/case01_points.csv")));
        let pairs = resolve_pairs(&pairs.unwrap(), &subjects, &root).unwrap();
        assert_eq!(pairs, vec![Pair { index: 0, fixed: 1, moving: 0 }]);
        let list = read_pair_list(&root.join("test_pairs.csv")).unwrap();
        assert_eq!(list.len(), 3);
        assert_eq!(list[0], NamedPair { fixed: "subject_01".into(), moving: "subject_00".into() });
    }
}
