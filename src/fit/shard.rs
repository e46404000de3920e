//! Sharded distillation: the statistics of a distillation (`ZᵀZ`, `Zᵀy` and sums, for the
//! fitting and the ridge-choice parts) are sums over calibration rows, so they can be
//! computed for disjoint shards of the rows on different machines, merged in any order,
//! and the head fitted from the merged sums — the same head as one machine's compile, up
//! to the rounding of the sums.
//!
//! What makes the split invisible:
//! - every row's part (fit, ridge choice, audit) is decided by its *global* index
//!   ([`row_part`]), so each shard is told the global index of its first row;
//! - the feature map must not depend on the rows: data-independent methods are sampled from
//!   the spec and seed alone; Nyström needs landmarks that are the same on every shard (the
//!   teacher's support vectors, `support` rule, with at most as many landmarks as support
//!   vectors);
//! - merging checks that the parts come from the same spec, the same sampled map
//!   (fingerprint of its program), the same teacher (its fingerprint) and disjoint rows.
//!
//! The map bandwidth search is not sharded: a shard uses the spec's `map_bandwidth`.
//!
//! ```
//! use kernelpress::fit::shard::ShardStats;
//! use kernelpress::fit::RidgeGrid;
//! use kernelpress::features::{FeatureSpec, Method};
//! use kernelpress::model::{ExactModel, Task};
//! use ndarray::{array, Array2};
//! let k: kernelpress::kernel::Kernel = "gaussian(gamma=0.5)".parse().unwrap();
//! let sv = array![[0.0, 0.0], [1.0, 0.5], [-1.0, 1.0]];
//! let exact = ExactModel::new(k.clone(), sv, array![[1.0], [-0.5], [0.25]], vec![0.1],
//!     Task::Regression, vec![], None).unwrap();
//! let x = Array2::from_shape_fn((300, 2), |(i, j)| ((i * 7 + j * 3) as f64 * 0.37).sin());
//! let spec = FeatureSpec::new(k, Method::Fourier, 2, 64, 3);
//! // Two shards, merged in either order, give the statistics of all 300 rows.
//! let mut a = ShardStats::compute(&exact, &spec, x.slice(ndarray::s![..120, ..]), 0).unwrap();
//! let b = ShardStats::compute(&exact, &spec, x.slice(ndarray::s![120.., ..]), 120).unwrap();
//! a.merge(&b).unwrap();
//! assert_eq!(a.rows(), 300);
//! let model = a.fit(&exact, &RidgeGrid::standard()).unwrap();
//! assert_eq!(model.features(), 64);
//! ```

use super::compile::{check_spec, finish_model, landmark_pool, with_kind, FIT_CHUNK};
use super::{row_part, Distiller, RidgeGrid};
use crate::features::{FeatureMap, FeatureSpec, Landmarks};
use crate::format::TensorFile;
use crate::model::{CompiledModel, ExactModel};
use crate::{Error, Result};
use ndarray::{s, ArrayView2};
use serde_json::{json, Value};
use std::path::Path;

/// The manifest `kind` of a statistics file.
pub const STATS_KIND: &str = "statistics";

/// The distillation statistics of some calibration rows (one shard, or several merged).
#[derive(Debug, Clone)]
pub struct ShardStats {
    spec: FeatureSpec,
    map_fingerprint: String,
    teacher: String,
    /// Global row ranges `[start, end)` covered, sorted and disjoint.
    ranges: Vec<(usize, usize)>,
    audit_rows: usize,
    dist: Distiller,
}

fn fnv(h: &mut u64, b: &[u8]) {
    for x in b {
        *h ^= *x as u64;
        *h = h.wrapping_mul(0x0100_0000_01b3);
    }
}

/// A fingerprint of a sampled map: FNV-1a (64 bits) over its program's manifest entry and
/// every parameter tensor, as the model file stores them.
pub fn map_fingerprint(map: &FeatureMap) -> String {
    let mut f = TensorFile::default();
    let meta = map.program.write(&mut f);
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    fnv(&mut h, meta.to_string().as_bytes());
    if let Ok(bytes) = f.to_bytes() {
        fnv(&mut h, &bytes);
    }
    format!("fnv1a64:{h:016x}")
}

/// Samples the map of `spec` for `exact` so that every shard draws the same map: from the
/// spec and seed alone, or (Nyström) from the teacher's support vectors.
pub fn shard_map(exact: &ExactModel, spec: &FeatureSpec) -> Result<FeatureMap> {
    check_spec(exact, spec)?;
    if spec.from_data() {
        let nsv = exact.n_support_vectors();
        if spec.options.landmarks != Landmarks::Support || spec.features > nsv {
            return Err(Error::input(format!(
                "a sharded distillation needs a map that is the same on every shard: {} landmarks drawn from calibration rows would differ between shards; use --landmark-rule support with at most {nsv} features (the teacher's support vectors), or a data-independent method",
                spec.method.name()
            )));
        }
        let pool = landmark_pool(exact, None, None, spec).expect("support rule gives a pool");
        return Ok(spec.sample(Some(pool.view()))?.0);
    }
    Ok(spec.sample(None)?.0)
}

impl ShardStats {
    /// Empty statistics for `spec` (its map is sampled with [`shard_map`]).
    pub fn new(exact: &ExactModel, spec: &FeatureSpec) -> Result<(ShardStats, FeatureMap)> {
        let map = shard_map(exact, spec)?;
        super::check_statistics_memory(map.output_dim())?;
        let stats = ShardStats {
            spec: spec.clone(),
            map_fingerprint: map_fingerprint(&map),
            teacher: exact.fingerprint(),
            ranges: Vec::new(),
            audit_rows: 0,
            dist: Distiller::new(map.output_dim(), exact.n_outputs()),
        };
        Ok((stats, map))
    }

    /// Empty statistics of a program identified by `fingerprint` (a refinement's current
    /// program, whose map no spec reproduces).
    pub(crate) fn for_program(
        spec: &FeatureSpec,
        fingerprint: String,
        teacher: String,
        p: usize,
        k: usize,
    ) -> ShardStats {
        ShardStats {
            spec: spec.clone(),
            map_fingerprint: fingerprint,
            teacher,
            ranges: Vec::new(),
            audit_rows: 0,
            dist: Distiller::new(p, k),
        }
    }

    /// Adds features `z` and teacher decisions `y` of rows `first …` (global indices).
    pub(crate) fn add_features(
        &mut self,
        first: usize,
        z: ArrayView2<f64>,
        y: ArrayView2<f64>,
    ) -> Result<()> {
        let end = first
            .checked_add(z.nrows())
            .ok_or_else(|| Error::input(format!("first row {first} is too large")))?;
        self.claim(first, end)?;
        self.audit_rows += (first..end).filter(|&i| super::audit_row(i)).count();
        self.dist.add_at(first, z, y, row_part);
        Ok(())
    }

    /// The summed statistics.
    pub(crate) fn distiller(&self) -> &Distiller {
        &self.dist
    }

    /// The statistics of the raw calibration rows `x`, whose first row has global index
    /// `first_row` in the whole calibration set.
    pub fn compute(
        exact: &ExactModel,
        spec: &FeatureSpec,
        x: ArrayView2<f64>,
        first_row: usize,
    ) -> Result<ShardStats> {
        let (mut st, map) = Self::new(exact, spec)?;
        st.add(exact, &map, x, first_row)?;
        Ok(st)
    }

    /// Adds raw calibration rows `x` (global indices `first_row …`): the teacher's decision
    /// values and the map's features, one chunk at a time. `map` is the one [`Self::new`]
    /// returned.
    pub fn add(
        &mut self,
        exact: &ExactModel,
        map: &FeatureMap,
        x: ArrayView2<f64>,
        first_row: usize,
    ) -> Result<()> {
        // A cheap guard against mixing up maps (the full fingerprints are checked when
        // statistics are merged or fitted).
        if (map.output_dim(), exact.n_outputs()) != self.dist.shape() {
            return Err(Error::input(
                "rows added to statistics with another teacher or map than they were made for",
            ));
        }
        crate::data::check_batch(x, exact.input_dim(), "calibration rows")?;
        let n = x.nrows();
        let end = first_row
            .checked_add(n)
            .ok_or_else(|| Error::input(format!("first row {first_row} is too large")))?;
        self.claim(first_row, end)?;
        for c in 0..n.div_ceil(FIT_CHUNK) {
            let r = c * FIT_CHUNK..((c + 1) * FIT_CHUNK).min(n);
            let xc = x.slice(s![r.clone(), ..]);
            let y = exact.decision(xc);
            if let Some(i) = y.iter().position(|v| !v.is_finite()) {
                return Err(Error::numerical(format!(
                    "calibration row {}: the exact model's decision value is not finite (overflow); the kernel or the data are too extreme",
                    first_row + r.start + i / y.ncols().max(1) + 1
                )));
            }
            let z = map.transform(exact.scale_inputs(xc).view());
            if let Some(i) = z.iter().position(|v| !v.is_finite()) {
                return Err(Error::numerical(format!(
                    "calibration row {}: a feature is not finite (overflow); the kernel or the data are too extreme",
                    first_row + r.start + i / z.ncols().max(1) + 1
                )));
            }
            let at = first_row + r.start;
            self.audit_rows += (at..at + r.len()).filter(|&i| super::audit_row(i)).count();
            self.dist.add_at(at, z.view(), y.view(), row_part);
        }
        Ok(())
    }

    fn claim(&mut self, start: usize, end: usize) -> Result<()> {
        if start == end {
            return Ok(());
        }
        if let Some((a, b)) = self
            .ranges
            .iter()
            .find(|(a, b)| start < *b && *a < end)
            .copied()
        {
            return Err(Error::input(format!(
                "rows {}–{} overlap rows {}–{} already in the statistics (counting from 1): each calibration row may enter once",
                start + 1,
                end,
                a + 1,
                b
            )));
        }
        self.ranges.push((start, end));
        self.ranges.sort_unstable();
        Ok(())
    }

    /// Adds `other`'s statistics: the same spec, map and teacher, disjoint rows.
    pub fn merge(&mut self, other: &ShardStats) -> Result<()> {
        if other.spec != self.spec {
            return Err(Error::input(format!(
                "statistics of different maps cannot be merged: {} vs {}",
                other.spec.to_json(),
                self.spec.to_json()
            )));
        }
        if other.map_fingerprint != self.map_fingerprint {
            return Err(Error::input(format!(
                "statistics were made with differently drawn maps ({} vs {}): the same spec sampled another map (another build, or landmarks that differ)",
                other.map_fingerprint, self.map_fingerprint
            )));
        }
        if other.teacher != self.teacher {
            return Err(Error::input(format!(
                "statistics of different exact models cannot be merged (teacher {} vs {})",
                other.teacher, self.teacher
            )));
        }
        let before = self.ranges.clone();
        for &(a, b) in &other.ranges {
            if let Err(e) = self.claim(a, b) {
                self.ranges = before;
                return Err(e);
            }
        }
        self.dist.merge(&other.dist);
        self.audit_rows += other.audit_rows;
        Ok(())
    }

    /// Calibration rows covered (every part, audit rows included).
    pub fn rows(&self) -> usize {
        self.ranges.iter().map(|(a, b)| b - a).sum()
    }

    /// Rows in the fitting and ridge-choice parts, and audit rows (never fitted on).
    pub fn parts(&self) -> (usize, usize, usize) {
        let (f, c) = self.dist.rows();
        (f, c, self.audit_rows)
    }

    /// Calibration rows in no shard: the `[start, end)` holes before and between the
    /// covered ranges (a shard missing from a merge, or first rows given wrongly).
    pub fn gaps(&self) -> Vec<(usize, usize)> {
        let mut out = Vec::new();
        let mut at = 0;
        for &(a, b) in &self.ranges {
            if a > at {
                out.push((at, a));
            }
            at = at.max(b);
        }
        out
    }

    /// Global row ranges `[start, end)` covered, sorted.
    pub fn ranges(&self) -> &[(usize, usize)] {
        &self.ranges
    }

    /// The spec the statistics were made for.
    pub fn spec(&self) -> &FeatureSpec {
        &self.spec
    }

    /// The fingerprint of the teacher the statistics were made with.
    pub fn teacher_fingerprint(&self) -> &str {
        &self.teacher
    }

    /// Fits the head from the statistics (ridge strength chosen on the ridge-choice part,
    /// as a single compile does) and builds the compiled model.
    pub fn fit(&self, exact: &ExactModel, grid: &RidgeGrid) -> Result<CompiledModel> {
        if exact.fingerprint() != self.teacher {
            return Err(Error::input(format!(
                "the statistics were made with another exact model (teacher {}; this one is {})",
                self.teacher,
                exact.fingerprint()
            )));
        }
        let map = shard_map(exact, &self.spec)?;
        if map_fingerprint(&map) != self.map_fingerprint {
            return Err(Error::input(
                "the map sampled here differs from the one the statistics were made with (another build?)",
            ));
        }
        self.fit_map(exact, map, grid)
    }

    /// [`Self::fit`] with the map already in hand (the one [`Self::new`] returned).
    fn fit_map(
        &self,
        exact: &ExactModel,
        map: FeatureMap,
        grid: &RidgeGrid,
    ) -> Result<CompiledModel> {
        let fit = self.dist.solve(grid)?;
        let mut j = with_kind(&fit, "distill");
        if self.ranges.len() != 1 || self.ranges[0].0 != 0 {
            // Several shards (a single pass over all rows from the first is an ordinary
            // compile, streamed or not, and records nothing more).
            j["sharded"] = json!({
                "calibration_rows": self.rows(),
                "audit_rows": self.audit_rows,
                "ranges": self.ranges.iter().map(|(a, b)| json!([a, b])).collect::<Vec<_>>(),
            });
        }
        finish_model(exact, map, fit.head, fit.intercept, j)
    }

    /// The statistics as a file: tensors `fit.*`, `choose.*` and a manifest (kind
    /// `statistics`) with the spec, fingerprints and row ranges.
    pub fn to_file(&self) -> TensorFile {
        let mut f = TensorFile::default();
        let rows = self.dist.write(&mut f, "");
        let (p, k) = self.dist.shape();
        let m = &mut f.manifest;
        m.insert("format_version".into(), json!(2));
        m.insert("kind".into(), json!(STATS_KIND));
        m.insert("generator".into(), json!(crate::model::generator_name()));
        m.insert("spec".into(), self.spec.to_json());
        m.insert("features".into(), json!(p));
        m.insert("outputs".into(), json!(k));
        m.insert("map_fingerprint".into(), json!(self.map_fingerprint));
        m.insert("teacher_fingerprint".into(), json!(self.teacher));
        m.insert(
            "ranges".into(),
            json!(self
                .ranges
                .iter()
                .map(|(a, b)| json!([a, b]))
                .collect::<Vec<_>>()),
        );
        m.insert("rows".into(), rows);
        m.insert("audit_rows".into(), json!(self.audit_rows));
        f
    }

    /// Serialised as safetensors bytes.
    pub fn to_bytes(&self) -> Result<Vec<u8>> {
        self.to_file().to_bytes()
    }

    /// Writes the statistics file atomically.
    pub fn save(&self, path: &Path) -> Result<()> {
        self.to_file().write(path)
    }

    /// Reads statistics from safetensors bytes (`src` names them in errors).
    pub fn from_bytes(bytes: &[u8], src: &str) -> Result<ShardStats> {
        let f = TensorFile::from_bytes(bytes, src)?;
        Self::from_file(&f, src)
    }

    /// Reads a statistics file.
    pub fn load(path: &Path) -> Result<ShardStats> {
        let src = path.display().to_string();
        Self::from_file(&TensorFile::read(path)?, &src)
    }

    fn from_file(f: &TensorFile, src: &str) -> Result<ShardStats> {
        let kind = f.get_str("kind", src)?;
        if kind != STATS_KIND {
            return Err(Error::file(format!(
                "{src}: a {kind} model, not distillation statistics (made by compile --stats-out)"
            )));
        }
        let get = |k: &str| -> Result<&Value> {
            f.manifest
                .get(k)
                .ok_or_else(|| Error::file(format!("{src}: manifest field '{k}' is missing")))
        };
        let spec = FeatureSpec::from_json(get("spec")?).map_err(|e| e.context(src))?;
        let p = f.get_u64("features", src)? as usize;
        let k = f.get_u64("outputs", src)? as usize;
        crate::limits::check_alloc(
            4 * (p as u64) * (p as u64),
            8,
            &format!("{src}: statistics for {p} features"),
        )?;
        let dist = Distiller::read(f, "", p, k, get("rows")?, src)?;
        let mut ranges = Vec::new();
        for r in get("ranges")?.as_array().into_iter().flatten() {
            let pair = r
                .as_array()
                .filter(|a| a.len() == 2)
                .and_then(|a| Some((a[0].as_u64()? as usize, a[1].as_u64()? as usize)));
            match pair {
                Some((a, b)) if a < b => ranges.push((a, b)),
                _ => {
                    return Err(Error::file(format!(
                        "{src}: manifest field 'ranges' must hold [start, end) pairs of row indices, found {r}"
                    )))
                }
            }
        }
        let mut st = ShardStats {
            spec,
            map_fingerprint: f.get_str("map_fingerprint", src)?,
            teacher: f.get_str("teacher_fingerprint", src)?,
            ranges: Vec::new(),
            audit_rows: f.get_u64("audit_rows", src)? as usize,
            dist,
        };
        for (a, b) in ranges {
            st.claim(a, b).map_err(|e| e.context(src))?;
        }
        let (fit, choose) = st.dist.rows();
        if fit + choose + st.audit_rows != st.rows() {
            return Err(Error::file(format!(
                "{src}: row counts ({fit} fit + {choose} choose + {} audit) do not add up to the {} rows of its ranges",
                st.audit_rows,
                st.rows()
            )));
        }
        Ok(st)
    }
}

/// A compile that reads its calibration rows as a stream of chunks (in file order): one
/// pass, the teacher's decisions and the map's features computed chunk by chunk, so memory
/// holds one chunk and the statistics however many rows there are. The rows whose global
/// index satisfies `keep` (e.g. [`super::audit_row`], for the report) are returned with the
/// model. Same result as [`super::compile_exact`] with the same map, rows and chunking of
/// [`FIT_CHUNK`] rows (the map must not depend on the rows: see [`shard_map`]).
pub fn distil_streamed(
    exact: &ExactModel,
    spec: &FeatureSpec,
    grid: &RidgeGrid,
    next: &mut dyn FnMut() -> Result<Option<ndarray::Array2<f64>>>,
    keep: &dyn Fn(usize) -> bool,
    obs: &dyn crate::observe::Observer,
) -> Result<(CompiledModel, ndarray::Array2<f64>)> {
    let (mut st, map) = ShardStats::new(exact, spec)?;
    let d = exact.input_dim();
    let mut kept: Vec<f64> = Vec::new();
    // The first chunk is read before the stage starts, so that a file that is bad from
    // its first rows fails with its message alone.
    let mut pending = next()?;
    obs.stage("distilling (streamed)", 0);
    while let Some(x) = pending.take() {
        let first = st.rows();
        st.add(exact, &map, x.view(), first)?;
        for (i, row) in x.rows().into_iter().enumerate() {
            if keep(first + i) {
                kept.extend(row.iter().copied());
            }
        }
        obs.advance(x.nrows() as u64);
        pending = next()?;
    }
    if st.rows() < 10 {
        return Err(Error::input(format!(
            "distillation needs at least 10 calibration rows, got {}",
            st.rows()
        )));
    }
    obs.stage("ridge solve", 1);
    // The map of this pass, not sampled again (Nyström would redo its eigendecomposition).
    let model = st.fit_map(exact, map, grid)?;
    obs.finish();
    let n = kept.len() / d.max(1);
    Ok((
        model,
        ndarray::Array2::from_shape_vec((n, d), kept).expect("whole rows"),
    ))
}
