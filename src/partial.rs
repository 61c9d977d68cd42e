//! Work split across machines: `price --part K/N` and `merge`.
//!
//! **One payoff.** Part `K` of `N` simulates a contiguous share of the run's blocks of
//! paths ([`sim::partial::part_blocks`]) and writes a *partial result*: a JSON file holding
//! every block's statistics exactly (64-bit words as hex), plus the record that ties it to
//! its run (payoff and market SHA-256, settings, overrides, pathfold version). `merge`
//! checks that the parts belong together and cover the run exactly once, compiles the
//! payoff again, replays the full run's merges in block order and reports what
//! `pathfold price FILE` would have, bit for bit.
//!
//! **A library.** Part `K` of `N` prices a contiguous share of the files the inputs expand
//! to (folders walked in sorted order) and writes CSV; part 1 alone writes the header, so
//! the outputs of parts 1 to N concatenated in that order are the single batch's CSV.

use std::collections::BTreeMap;
use std::fs;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use serde::{Deserialize, Serialize};

use crate::pricing::{self, sha256_hex, Failure, CAUTION};
use crate::sim::partial::{blocks_run, from_words, part_blocks, paths_run, to_words, Replay, Shape};
use crate::sim::{self, Settings};
use crate::typing::Override;

/// What the `format` field of a partial result says.
pub const FORMAT_NAME: &str = "pathfold partial result";

/// The version of the partial-result format this pathfold writes and reads.
pub const FORMAT_VERSION: u32 = 1;

/// Part `k` of `n`, numbered from 1.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Part {
    pub k: u64,
    pub n: u64,
}

impl Part {
    /// Parses `K/N` with `1 ≤ K ≤ N`.
    pub fn parse(text: &str) -> Result<Part, String> {
        let bad = || {
            format!(
                "--part {text}: give the part as K/N, the K-th of N parts numbered from 1, e.g. `--part 3/16` (a scheduler counting from 0 passes its index + 1)"
            )
        };
        let (k, n) = text.trim().split_once('/').ok_or_else(bad)?;
        let (k, n): (u64, u64) = (k.trim().parse().map_err(|_| bad())?, n.trim().parse().map_err(|_| bad())?);
        if n == 0 || k == 0 || k > n {
            return Err(bad());
        }
        Ok(Part { k, n })
    }

    /// The share `[start, end)` of `len` items that is this part's: contiguous, in order,
    /// sizes differing by at most one.
    pub fn share(&self, len: usize) -> std::ops::Range<usize> {
        let r = part_blocks(len as u64, self.k, self.n);
        r.start as usize..r.end as usize
    }
}

impl std::fmt::Display for Part {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}/{}", self.k, self.n)
    }
}

/// A partial result as written to its file (see DEVELOPERS.md, "Partial results").
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct PartFile {
    pub format: String,
    pub format_version: u32,
    pub pathfold_version: String,
    pub part: u64,
    pub parts: u64,
    pub blocks: BlockRange,
    pub payoff_file: String,
    pub payoff_sha256: String,
    pub market_file: String,
    pub market_sha256: String,
    pub settings: PartSettings,
    pub shape: PartShape,
    pub elapsed_seconds: f64,
    /// One string per block of the range, in block order: the words of
    /// [`sim::partial::to_words`], each as 16 hex digits.
    pub statistics: Vec<String>,
    pub caution: String,
}

/// The blocks `first..end` (end excluded) of a run of `of` blocks.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct BlockRange {
    pub first: u64,
    pub end: u64,
    pub of: u64,
}

#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct PartSettings {
    pub paths: u64,
    pub seed: u64,
    pub antithetic: bool,
    pub control_variates: bool,
    pub overrides: Vec<String>,
}

#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct PartShape {
    pub dims: usize,
    pub events: usize,
    pub payments: usize,
    pub pay_sites: usize,
    /// Comparisons whose operands may not be numbers (absent in files written before
    /// they were counted: read as none).
    #[serde(default)]
    pub condition_sites: usize,
}

impl From<Shape> for PartShape {
    fn from(s: Shape) -> Self {
        PartShape {
            dims: s.dims,
            events: s.events,
            payments: s.payments,
            pay_sites: s.sites,
            condition_sites: s.conditions,
        }
    }
}

/// Words as hex: 16 digits each.
pub fn words_hex(words: &[u64]) -> String {
    words.iter().map(|w| format!("{w:016x}")).collect()
}

/// The words [`words_hex`] wrote.
pub fn hex_words(text: &str) -> Option<Vec<u64>> {
    if !text.len().is_multiple_of(16) || !text.is_ascii() {
        return None;
    }
    (0..text.len()).step_by(16).map(|i| u64::from_str_radix(&text[i..i + 16], 16).ok()).collect()
}

/// Refuses more parts than the run has blocks.
pub fn check_part_count(settings: &Settings, part: Part) -> Result<(), String> {
    let blocks = blocks_run(settings);
    if part.n > blocks {
        return Err(format!(
            "--part {part}: {} paths are {blocks} block{} of {} paths, too few for {} parts\n  fix: split into at most {blocks} part{}, or run more paths",
            paths_run(settings),
            if blocks == 1 { "" } else { "s" },
            sim::BLOCK,
            part.n,
            if blocks == 1 { "" } else { "s" }
        ));
    }
    Ok(())
}

/// Runs part `part` of the run of `file` with these settings: the partial result, or the
/// payoff's failure (`Ok(Err)`); `Err` refuses the part (more parts than blocks, or bad
/// settings).
pub fn run_part(
    file: &Path,
    market: Option<&Path>,
    overrides: &[Override],
    settings: &Settings,
    part: Part,
) -> Result<Result<PartFile, Failure>, String> {
    settings.validate()?;
    check_part_count(settings, part)?;
    let started = Instant::now();
    let blocks = blocks_run(settings);
    let range = part_blocks(blocks, part.k, part.n);
    let compiled = match pricing::compile_file(file, market, overrides) {
        Ok(c) => c,
        Err(f) => return Ok(Err(f)),
    };
    let shape = Shape::of(&compiled.program, settings);
    let stats = sim::partial::simulate_blocks(&compiled.program, settings, range.clone());
    Ok(Ok(PartFile {
        format: FORMAT_NAME.into(),
        format_version: FORMAT_VERSION,
        pathfold_version: env!("CARGO_PKG_VERSION").into(),
        part: part.k,
        parts: part.n,
        blocks: BlockRange { first: range.start, end: range.end, of: blocks },
        payoff_file: file.display().to_string(),
        payoff_sha256: sha256_hex(compiled.source.as_bytes()),
        market_file: compiled.market_path.display().to_string(),
        market_sha256: sha256_hex(&compiled.market_bytes),
        settings: PartSettings {
            paths: settings.paths,
            seed: settings.seed,
            antithetic: settings.antithetic,
            control_variates: settings.control_variates,
            overrides: overrides.iter().map(|o| format!("{}={}", o.name, o.value)).collect(),
        },
        shape: shape.into(),
        elapsed_seconds: started.elapsed().as_secs_f64(),
        statistics: stats.iter().map(|b| words_hex(&to_words(b))).collect(),
        caution: CAUTION.into(),
    }))
}

/// A part's header: its file without the statistics.
struct Header {
    path: PathBuf,
    index: usize,
    file: PartFile,
}

/// Reads a partial result from its file.
pub fn read_part(path: &Path) -> Result<PartFile, String> {
    let shown = path.display();
    let text = crate::files::read_regular_file(path).map_err(|e| format!("{shown}: cannot read this part: {e}"))?;
    parse_part(path, &text)
}

/// Reads a partial result from its text; `path` names it in messages.
pub fn parse_part(path: &Path, text: &str) -> Result<PartFile, String> {
    let shown = path.display();
    let value: serde_json::Value = serde_json::from_str(text)
        .map_err(|e| format!("{shown}: not a partial result of `pathfold price --part` (not JSON: {e})"))?;
    if value.get("format").and_then(|f| f.as_str()) != Some(FORMAT_NAME) {
        return Err(format!(
            "{shown}: not a partial result of `pathfold price --part` (no `\"format\": \"{FORMAT_NAME}\"`)"
        ));
    }
    match value.get("format_version").and_then(|v| v.as_u64()) {
        Some(v) if v == u64::from(FORMAT_VERSION) => {}
        Some(v) => {
            return Err(format!(
                "{shown}: partial-result format version {v}; this pathfold ({}) reads version {FORMAT_VERSION}\n  fix: merge with the pathfold that wrote the parts",
                env!("CARGO_PKG_VERSION")
            ))
        }
        None => return Err(format!("{shown}: the partial result has no `format_version`")),
    }
    serde_json::from_value(value).map_err(|e| format!("{shown}: a damaged partial result: {e}"))
}

/// Merges the parts `names` (files, or other labels), which `load` reads by index (it is
/// called twice per part, so that one part's statistics are in memory at a time), into the
/// full run's result. `ready` is told the payoff and market files before the work starts.
/// `Err` refuses the parts (the message names the culprit); `Ok(Err)` is the full run's
/// own failure (a payment that is not a finite number), as `price` reports it.
pub fn merge_parts(
    names: &[PathBuf],
    load: &dyn Fn(usize) -> Result<PartFile, String>,
    ready: &dyn Fn(&Path, &Path) -> Result<(), String>,
) -> Result<Result<pricing::Priced, Failure>, String> {
    let started = Instant::now();
    if names.is_empty() {
        return Err("no parts to merge".into());
    }
    // First pass: the headers, checked against each other and for coverage.
    let mut headers = Vec::new();
    for (i, path) in names.iter().enumerate() {
        let mut file = load(i)?;
        let b = &file.blocks;
        if file.statistics.len() as u64 != b.end.saturating_sub(b.first) {
            return Err(format!(
                "{}: holds {} blocks' statistics for the blocks {}..{} ({} blocks): a damaged partial result",
                path.display(),
                file.statistics.len(),
                b.first,
                b.end,
                b.end.saturating_sub(b.first)
            ));
        }
        file.statistics = Vec::new();
        headers.push(Header { path: path.clone(), index: i, file });
    }
    check_together(&headers)?;
    let first = &headers[0].file;
    let version = env!("CARGO_PKG_VERSION");
    if first.pathfold_version != version {
        return Err(format!(
            "{}: written by pathfold {}, and this is pathfold {version}: the bits of a seed are only promised within one version\n  fix: merge with pathfold {}",
            headers[0].path.display(),
            first.pathfold_version,
            first.pathfold_version
        ));
    }
    let ordered = check_cover(&headers)?;
    // The payoff again, from the files the parts name, unchanged.
    let s = &first.settings;
    let settings = Settings {
        paths: s.paths,
        seed: s.seed,
        antithetic: s.antithetic,
        control_variates: s.control_variates,
        ..Settings::default()
    };
    settings.validate()?;
    let overrides: Vec<Override> =
        s.overrides.iter().map(|o| Override::parse(o)).collect::<Result<_, _>>().map_err(|d| d.render(None))?;
    let payoff = PathBuf::from(&first.payoff_file);
    let market = PathBuf::from(&first.market_file);
    let compiled = pricing::compile_file(&payoff, Some(&market), &overrides).map_err(|f| {
        format!("{}the payoff {} of the parts cannot be compiled again for the merge", f.render(), payoff.display())
    })?;
    for (what, path, recorded, now) in [
        ("payoff", &payoff, &first.payoff_sha256, sha256_hex(compiled.source.as_bytes())),
        ("market", &market, &first.market_sha256, sha256_hex(&compiled.market_bytes)),
    ] {
        if *recorded != now {
            return Err(format!(
                "{}: this {what} file has changed since the parts ran (SHA-256 {} in the parts, {} now)\n  fix: merge against the {what} file the parts priced, or run the parts again",
                path.display(),
                short(recorded),
                short(&now)
            ));
        }
    }
    let shape = Shape::of(&compiled.program, &settings);
    if PartShape::from(shape) != first.shape {
        return Err(format!(
            "{}: the parts' statistics do not fit the payoff {} as compiled now (a damaged partial result?)",
            headers[0].path.display(),
            payoff.display()
        ));
    }
    ready(&payoff, &market)?;
    // Second pass: every block, in block order, into the full run's sequence of merges.
    let mut replay = Replay::new(&compiled.program, &settings);
    let mut elapsed = 0.0;
    for h in &ordered {
        let part = load(h.index)?;
        if part.blocks != h.file.blocks || part.payoff_sha256 != h.file.payoff_sha256 {
            return Err(format!("{}: changed while it was being merged", h.path.display()));
        }
        elapsed += part.elapsed_seconds.max(0.0);
        for (i, text) in part.statistics.iter().enumerate() {
            let index = part.blocks.first + i as u64;
            let block = hex_words(text)
                .ok_or_else(|| "not hex words".to_string())
                .and_then(|w| from_words(&w, &shape))
                .map_err(|e| format!("{}: block {index}: {e}: a damaged partial result", h.path.display()))?;
            replay.add(&block);
        }
    }
    let estimate = replay.finish(started);
    Ok(compiled.priced(estimate, &settings, &overrides, None).map(|mut priced| {
        // The time is the work of the whole run: the parts' simulations plus this merge.
        priced.estimate.elapsed = Duration::from_secs_f64(elapsed) + started.elapsed();
        priced
    }))
}

fn short(hash: &str) -> &str {
    &hash[..hash.len().min(12)]
}

/// Refuses parts of different runs, naming the first part that differs and how.
fn check_together(headers: &[Header]) -> Result<(), String> {
    let first = &headers[0];
    let f = &first.file;
    for h in &headers[1..] {
        let o = &h.file;
        let s = (&f.settings, &o.settings);
        let differences: [(&str, String, String); 11] = [
            ("payoff (SHA-256)", f.payoff_sha256.clone(), o.payoff_sha256.clone()),
            ("market (SHA-256)", f.market_sha256.clone(), o.market_sha256.clone()),
            ("seed", s.0.seed.to_string(), s.1.seed.to_string()),
            ("paths", s.0.paths.to_string(), s.1.paths.to_string()),
            ("antithetic", s.0.antithetic.to_string(), s.1.antithetic.to_string()),
            ("control variates", s.0.control_variates.to_string(), s.1.control_variates.to_string()),
            ("overrides (--set)", format!("[{}]", s.0.overrides.join(", ")), format!("[{}]", s.1.overrides.join(", "))),
            ("number of parts", f.parts.to_string(), o.parts.to_string()),
            ("number of blocks", f.blocks.of.to_string(), o.blocks.of.to_string()),
            ("pathfold version", f.pathfold_version.clone(), o.pathfold_version.clone()),
            ("statistics layout", format!("{:?}", f.shape), format!("{:?}", o.shape)),
        ];
        if let Some((what, a, b)) = differences.iter().find(|(_, a, b)| a != b) {
            let (a, b) = if what.contains("SHA-256") { (short(a), short(b)) } else { (a.as_str(), b.as_str()) };
            return Err(format!(
                "{} (part {}/{}) does not belong with {} (part {}/{}): its {what} is {b}, not {a}\n  fix: merge only the parts of one run: the same payoff, market, --paths, --seed, --set and options, split the same way",
                h.path.display(),
                o.part,
                o.parts,
                first.path.display(),
                f.part,
                f.parts
            ));
        }
    }
    Ok(())
}

/// Checks that the parts are parts 1 to N of the run, each once, each with its own blocks;
/// returns them in part order.
fn check_cover(headers: &[Header]) -> Result<Vec<&Header>, String> {
    let n = headers[0].file.parts;
    let mut by_part: BTreeMap<u64, &Header> = BTreeMap::new();
    for h in headers {
        let o = &h.file;
        let expected = part_blocks(o.blocks.of, o.part.max(1), n.max(1));
        if o.part == 0 || o.part > n || (o.blocks.first..o.blocks.end) != expected {
            return Err(format!(
                "{}: claims to be part {}/{n} with blocks {}..{} of {}, which is not how pathfold splits a run: a damaged partial result",
                h.path.display(),
                o.part,
                o.blocks.first,
                o.blocks.end,
                o.blocks.of
            ));
        }
        if let Some(other) = by_part.insert(o.part, h) {
            let same = fs::canonicalize(&other.path).ok() == fs::canonicalize(&h.path).ok();
            let how = if same { "the same file given twice" } else { "both hold the same blocks" };
            return Err(format!(
                "{} and {} are both part {}/{n} ({how})\n  fix: give each part of the run once",
                other.path.display(),
                h.path.display(),
                o.part
            ));
        }
    }
    let missing: Vec<String> = (1..=n).filter(|k| !by_part.contains_key(k)).map(|k| format!("{k}/{n}")).collect();
    if !missing.is_empty() {
        let shown: Vec<&str> = missing.iter().take(10).map(String::as_str).collect();
        let more = if missing.len() > 10 { format!(" and {} more", missing.len() - 10) } else { String::new() };
        return Err(format!(
            "missing part{} {}{more} of the run of {} (the parts given cover {} of its {n} parts)\n  fix: run the missing parts with `pathfold price {} --part K/{n}` and the same options, then merge all {n}",
            if missing.len() == 1 { "" } else { "s" },
            shown.join(", "),
            headers[0].file.payoff_file,
            n as usize - missing.len(),
            headers[0].file.payoff_file
        ));
    }
    Ok(by_part.into_values().collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_parts() {
        assert_eq!(Part::parse("3/16"), Ok(Part { k: 3, n: 16 }));
        assert_eq!(Part::parse(" 1 / 1 "), Ok(Part { k: 1, n: 1 }));
        for bad in ["0/4", "5/4", "1/0", "3", "a/b", "-1/4", ""] {
            assert!(Part::parse(bad).is_err(), "{bad}");
        }
    }

    #[test]
    fn shares_tile_the_items() {
        let shares: Vec<_> = (1..=3).map(|k| Part { k, n: 3 }.share(10)).collect();
        assert_eq!(shares, vec![0..3, 3..6, 6..10]);
        assert_eq!(Part { k: 2, n: 4 }.share(1), 0..0);
    }

    #[test]
    fn hex_words_round_trip() {
        let words = [0, 1, u64::MAX, f64::NAN.to_bits(), (-0.0f64).to_bits(), 0x0123_4567_89ab_cdef];
        assert_eq!(hex_words(&words_hex(&words)).as_deref(), Some(&words[..]));
        assert_eq!(hex_words("123"), None);
        assert_eq!(hex_words("zzzzzzzzzzzzzzzz"), None);
    }

    #[test]
    fn json_numbers_read_back_to_their_bits() {
        // serde_json's default reader may miss the nearest double by an ulp; a JSON result
        // read back (a partial's header, a batch compared with its CSV) must give the
        // bits that were written. 370.29541036713204 is a standard error that came back
        // one ulp off before `float_roundtrip` was turned on.
        for x in
            [370.295_410_367_132_04_f64, 0.1, 1.0 / 3.0, 88.120_728_886_135_25, 2.225_073_858_507_201e-308, 9.007e15]
        {
            let text = serde_json::to_string(&x).unwrap();
            let back: f64 = serde_json::from_str(&text).unwrap();
            assert_eq!(back.to_bits(), x.to_bits(), "{text}");
        }
    }
}
