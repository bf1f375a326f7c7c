//! The memory budget: how much memory a run may plan to use, and the check of the blocking
//! plan's estimate against it (see [`crate::pipeline::MemoryEstimate`]).
//!
//! The budget is given as a size (`--memory-budget 8G`) or, by default, taken as a share
//! ([`DEFAULT_SHARE`]) of the smallest memory limit the process is under: its cgroup's limit,
//! the memory the kernel reports available, and the address-space limit (`ulimit -v`). The
//! check runs after the tables are read and every pass's pairs are counted, before any pair
//! is made, so a run whose blocking is far too loose stops in seconds with a message naming
//! the pass, instead of being killed or failing an allocation an hour later.

use crate::error::{Error, ErrorKind, Result};
use crate::pipeline::{count_text, MemoryEstimate};

/// The share of the smallest memory limit that the default budget allows.
///
/// The estimate is of the peak resident memory and errs by a few per cent on measured runs;
/// the remaining fifth is left for what it does not count: the allocator's free but unreturned
/// pages and fragmentation, the thread stacks and per-thread allocator arenas (which count
/// against an address-space limit though barely resident), the program itself, and the other
/// processes sharing the machine or the cgroup.
pub const DEFAULT_SHARE: f64 = 0.8;

/// A memory budget in force.
#[derive(Debug, Clone, PartialEq)]
pub struct MemoryBudget {
    /// The most bytes the run may plan to use.
    pub bytes: u64,
    /// Where the figure comes from, for messages ("--memory-budget 500M", or "80% of the
    /// address-space limit (ulimit -v) of 300 MB").
    pub source: String,
}

/// What `--memory-budget` said: a size, or the check switched off.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BudgetArg {
    /// `0`, `none` or `off`: no check.
    Off,
    /// A budget in bytes.
    Bytes(u64),
}

/// A memory limit the process is under.
#[derive(Debug, Clone, PartialEq)]
pub struct Limit {
    /// What it is, in words ("the cgroup's memory limit").
    pub what: String,
    /// Its size in bytes.
    pub bytes: u64,
}

/// Parses a size: a number (fractions allowed) with an optional unit. `k`, `M`, `G`, `T`
/// (optionally followed by `B`) are powers of 1000; `Ki`, `Mi`, `Gi`, `Ti` (optionally
/// followed by `B`) powers of 1024; `B` or no unit is bytes. Case is ignored and a space may
/// stand between the number and its unit. `0`, `none` and `off` switch the check off.
pub fn parse_size(text: &str) -> std::result::Result<BudgetArg, String> {
    let t = text.trim();
    if t.eq_ignore_ascii_case("none") || t.eq_ignore_ascii_case("off") {
        return Ok(BudgetArg::Off);
    }
    let split = t
        .find(|c: char| !(c.is_ascii_digit() || c == '.'))
        .unwrap_or(t.len());
    let (number, unit) = (&t[..split], t[split..].trim());
    let bad = || {
        format!("`{text}` is not a size; give a number with an optional unit, e.g. 8G, 500M or 2GiB (or `none` to switch the check off)")
    };
    if number.is_empty() || number.starts_with('.') || number.ends_with('.') {
        return Err(bad());
    }
    let value: f64 = number.parse().map_err(|_| bad())?;
    let unit = unit.to_ascii_lowercase();
    let unit = unit.strip_suffix('b').unwrap_or(&unit);
    let scale: f64 = match unit {
        "" => 1.0,
        "k" => 1e3,
        "m" => 1e6,
        "g" => 1e9,
        "t" => 1e12,
        "ki" => 1024.0,
        "mi" => 1024f64.powi(2),
        "gi" => 1024f64.powi(3),
        "ti" => 1024f64.powi(4),
        _ => {
            return Err(format!(
                "`{text}`: unknown unit `{}`; use k, M, G, T (powers of 1000) or Ki, Mi, Gi, Ti (powers of 1024)",
                t[split..].trim()
            ))
        }
    };
    let bytes = (value * scale).floor();
    // 2^64 bytes is past any memory; a size that large is a typing slip.
    if !bytes.is_finite() || bytes >= 18_446_744_073_709_551_616.0 {
        return Err(format!("`{text}` is too large a size"));
    }
    Ok(match bytes as u64 {
        0 => BudgetArg::Off,
        b => BudgetArg::Bytes(b),
    })
}

/// The budget a run asks for: none, a given size, or the default, which is worked out when
/// the check runs (after the tables are read, so the threads' reserved address space is
/// known; see [`limits`]).
#[derive(Debug, Clone, PartialEq)]
pub enum Budget {
    /// No check.
    Off,
    /// A budget given by the user.
    Given(MemoryBudget),
    /// [`default_budget`] at the time of the check.
    Default,
}

impl Budget {
    /// The budget in force now, if any.
    pub fn resolve(&self) -> Option<MemoryBudget> {
        match self {
            Budget::Off => None,
            Budget::Given(b) => Some(b.clone()),
            Budget::Default => default_budget(),
        }
    }
}

/// The budget `--memory-budget` asks for: `arg` as parsed and `given_as` its text (the
/// default without the option).
pub fn budget_for(arg: Option<BudgetArg>, given_as: Option<&str>) -> Budget {
    match arg {
        Some(BudgetArg::Off) => Budget::Off,
        Some(BudgetArg::Bytes(bytes)) => Budget::Given(MemoryBudget {
            bytes,
            source: format!("--memory-budget {}", given_as.unwrap_or("")),
        }),
        None => Budget::Default,
    }
}

/// The default budget: [`DEFAULT_SHARE`] of the smallest of the process's memory limits
/// ([`limits`]); none where no limit is known (outside Linux).
pub fn default_budget() -> Option<MemoryBudget> {
    budget_from_limits(&limits())
}

/// [`DEFAULT_SHARE`] of the smallest of `limits`.
pub fn budget_from_limits(limits: &[Limit]) -> Option<MemoryBudget> {
    let smallest = limits.iter().min_by_key(|l| l.bytes)?;
    Some(MemoryBudget {
        bytes: (DEFAULT_SHARE * smallest.bytes as f64) as u64,
        source: format!(
            "the default, {:.0}% of {}, {}",
            100.0 * DEFAULT_SHARE,
            size_text(smallest.bytes),
            smallest.what
        ),
    })
}

/// With `DOVETAIL_TRACE_MEMORY` set, prints `memory: LABEL rss N MiB, peak N MiB` (VmRSS
/// and VmHWM of /proc/self/status) to stderr: a developer's probe for where a run's peak
/// falls (DEVELOPERS.md, benchmarks). Does nothing otherwise, or off Linux.
pub fn trace_memory(label: &str) {
    static ON: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    if !*ON.get_or_init(|| std::env::var_os("DOVETAIL_TRACE_MEMORY").is_some()) {
        return;
    }
    let Ok(status) = std::fs::read_to_string("/proc/self/status") else {
        return;
    };
    let kb = |key: &str| -> u64 {
        status
            .lines()
            .find(|l| l.starts_with(key))
            .and_then(|l| l.split_whitespace().nth(1)?.parse().ok())
            .unwrap_or(0)
    };
    eprintln!(
        "memory: {label} rss {} MiB, peak {} MiB",
        kb("VmRSS:") / 1024,
        kb("VmHWM:") / 1024
    );
}

/// Bytes for messages: decimal MB or GB, as [`crate::pipeline::human_bytes`], and plain bytes
/// or kB below a megabyte.
pub fn size_text(b: u64) -> String {
    if b >= 1_000_000 {
        crate::pipeline::human_bytes(b)
    } else if b >= 1_000 {
        format!("{:.0} kB", b as f64 / 1e3)
    } else {
        format!("{b} bytes")
    }
}

/// A pass as the budget's message names it.
#[derive(Debug, Clone)]
pub struct PassLabel {
    /// Its name ("pass 1", or the config's `name`).
    pub name: String,
    /// Its keys as the config writes them, joined by ` + `.
    pub keys: String,
    /// A sorted-neighbourhood pass (its pairs are bounded by its window).
    pub window: bool,
}

impl MemoryBudget {
    /// Checks the blocking plan's estimate against the budget. Over it, the error names the
    /// pass with the most pairs (its keys and pairs), the estimate and the budget, and says
    /// what to do. `labels` holds one entry per pass of `estimate`, in order.
    pub fn check(&self, estimate: &MemoryEstimate, labels: &[PassLabel]) -> Result<()> {
        if estimate.peak_bytes <= self.bytes {
            return Ok(());
        }
        let worst = estimate
            .pairs_per_pass
            .iter()
            .enumerate()
            .max_by_key(|&(i, &p)| (p, std::cmp::Reverse(i)))
            .and_then(|(i, &p)| labels.get(i).map(|l| (l, p)));
        let advice = match worst {
            Some((l, p)) if p > 0 => {
                let change = if l.window {
                    "narrow the window of"
                } else {
                    "add a key part to"
                };
                format!(
                    "{change} {} (`{}`, {} pairs) or raise --memory-budget",
                    l.name,
                    l.keys,
                    count_text(p as f64)
                )
            }
            // The tables alone are over the budget.
            _ => "raise --memory-budget or link smaller tables".to_string(),
        };
        Err(Error::new(
            ErrorKind::OverBudget,
            format!(
                "the run needs an estimated {} at its peak, over the memory budget of {} ({}): blocking would make at most {} candidate pairs; {advice} (`--memory-budget none` switches the check off)",
                size_text(estimate.peak_bytes),
                size_text(self.bytes),
                self.source,
                count_text(estimate.pairs_bound as f64),
            ),
        ))
    }
}

/// The memory limits the process is under, each once: the cgroup's memory limit (v2
/// `memory.max` or v1 `memory.limit_in_bytes`, the smallest along the process's cgroup path),
/// `MemAvailable` from /proc/meminfo, and the address-space limit (RLIMIT_AS). Empty outside
/// Linux.
pub fn limits() -> Vec<Limit> {
    #[cfg(target_os = "linux")]
    {
        linux::limits()
    }
    #[cfg(not(target_os = "linux"))]
    {
        Vec::new()
    }
}

#[cfg(target_os = "linux")]
mod linux {
    use super::Limit;
    use std::path::{Path, PathBuf};

    /// A cgroup v1 "no limit" is a page-rounded i64::MAX; anything this large is no limit.
    const NO_LIMIT: u64 = 1 << 62;

    pub fn limits() -> Vec<Limit> {
        let mut out = Vec::new();
        let cgroups = std::fs::read_to_string("/proc/self/cgroup").unwrap_or_default();
        if let Some(bytes) = cgroup_limit(&cgroups, Path::new("/sys/fs/cgroup")) {
            out.push(Limit {
                what: "the cgroup's memory limit".to_string(),
                bytes,
            });
        }
        let meminfo = std::fs::read_to_string("/proc/meminfo").unwrap_or_default();
        if let Some(bytes) = mem_available(&meminfo) {
            out.push(Limit {
                what: "the available memory (MemAvailable)".to_string(),
                bytes,
            });
        }
        if let Some(limit) = address_space_limit() {
            // The address space already reserved but not resident (thread stacks, allocator
            // arenas, the program's mapped files) counts against the limit and is not in the
            // estimate, which counts resident memory.
            let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
            let reserved = reserved_not_resident(&status).unwrap_or(0);
            out.push(Limit {
                what: if reserved > 0 {
                    format!(
                        "the address-space limit (ulimit -v) of {} less {} reserved but not resident",
                        super::size_text(limit),
                        super::size_text(reserved)
                    )
                } else {
                    "the address-space limit (ulimit -v)".to_string()
                },
                bytes: limit.saturating_sub(reserved),
            });
        }
        out
    }

    /// `MemAvailable` of a /proc/meminfo text, in bytes.
    pub fn mem_available(meminfo: &str) -> Option<u64> {
        let line = meminfo.lines().find(|l| l.starts_with("MemAvailable:"))?;
        let kb: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
        Some(kb.saturating_mul(1024))
    }

    /// `VmSize - VmRSS` of a /proc/self/status text, in bytes: the address space mapped but
    /// not resident.
    pub fn reserved_not_resident(status: &str) -> Option<u64> {
        let kb = |key: &str| -> Option<u64> {
            let line = status.lines().find(|l| l.starts_with(key))?;
            line.split_whitespace().nth(1)?.parse().ok()
        };
        Some(
            kb("VmSize:")?
                .saturating_sub(kb("VmRSS:")?)
                .saturating_mul(1024),
        )
    }

    /// The smallest memory limit along the process's cgroup paths (from a /proc/self/cgroup
    /// text), under the cgroup mount `root`: v2 (`0::/path`, `memory.max` in `root/path` and
    /// its parents) and v1 (`N:memory:/path` or a list holding `memory`,
    /// `memory.limit_in_bytes` under `root/memory`). Paths that do not exist in this mount
    /// namespace are skipped; the mount's own root is always read.
    pub fn cgroup_limit(cgroups: &str, root: &Path) -> Option<u64> {
        let mut found: Option<u64> = None;
        let mut take = |v: Option<u64>| {
            if let Some(v) = v.filter(|&v| v < NO_LIMIT) {
                found = Some(found.map_or(v, |f| f.min(v)));
            }
        };
        let mut v2 = None;
        let mut v1 = None;
        for line in cgroups.lines() {
            let mut parts = line.splitn(3, ':');
            let (Some(id), Some(controllers), Some(path)) =
                (parts.next(), parts.next(), parts.next())
            else {
                continue;
            };
            if id == "0" && controllers.is_empty() {
                v2 = Some(path.to_string());
            } else if controllers.split(',').any(|c| c == "memory") {
                v1 = Some(path.to_string());
            }
        }
        let v2_root = if root.join("unified").join("cgroup.controllers").exists() {
            root.join("unified")
        } else {
            root.to_path_buf()
        };
        for dir in along(&v2_root, v2.as_deref().unwrap_or("/")) {
            take(read_number(&dir.join("memory.max")));
        }
        let v1_root = root.join("memory");
        for dir in along(&v1_root, v1.as_deref().unwrap_or("/")) {
            take(read_number(&dir.join("memory.limit_in_bytes")));
        }
        found
    }

    /// `root/path` and each of its parents up to `root`.
    fn along(root: &Path, path: &str) -> Vec<PathBuf> {
        let mut dirs = vec![root.to_path_buf()];
        let mut dir = root.to_path_buf();
        for part in path.split('/').filter(|p| !p.is_empty() && *p != "..") {
            dir.push(part);
            dirs.push(dir.clone());
        }
        dirs
    }

    /// A file holding one number (`max` and unreadable files give none).
    fn read_number(path: &Path) -> Option<u64> {
        std::fs::read_to_string(path).ok()?.trim().parse().ok()
    }

    /// The soft address-space limit (RLIMIT_AS), when there is one.
    fn address_space_limit() -> Option<u64> {
        let mut lim = libc::rlimit {
            rlim_cur: 0,
            rlim_max: 0,
        };
        // SAFETY: getrlimit writes one rlimit into the struct it is given and nothing else.
        let rc = unsafe { libc::getrlimit(libc::RLIMIT_AS, &mut lim) };
        if rc != 0 || lim.rlim_cur == libc::RLIM_INFINITY {
            return None;
        }
        Some(lim.rlim_cur)
    }

    #[cfg(test)]
    mod tests {
        use super::*;

        #[test]
        fn meminfo_line() {
            // The /proc/meminfo layout (proc(5)): values in kB.
            let text =
                "MemTotal:       32000000 kB\nMemFree:  100 kB\nMemAvailable:   24060088 kB\n";
            assert_eq!(mem_available(text), Some(24_060_088 * 1024));
            assert_eq!(mem_available("MemTotal: 5 kB\n"), None);
        }

        #[test]
        fn status_lines() {
            // The /proc/self/status layout (proc(5)): VmSize and VmRSS in kB.
            let text = "Name:\tdovetail\nVmPeak:\t  300000 kB\nVmSize:\t  250000 kB\nVmRSS:\t   50000 kB\n";
            assert_eq!(reserved_not_resident(text), Some(200_000 * 1024));
            assert_eq!(reserved_not_resident("Name:\tx\n"), None);
        }

        #[test]
        fn cgroup_files() {
            // A fake cgroup tree: v1 memory controller with a limit on the process's group
            // and "no limit" above it; a v2 group whose parent has the smaller limit.
            let dir = tempfile::tempdir().expect("tempdir");
            let root = dir.path();
            let v1 = root.join("memory/jobs/a");
            std::fs::create_dir_all(&v1).expect("mkdir");
            std::fs::write(
                root.join("memory/memory.limit_in_bytes"),
                "9223372036854771712\n",
            )
            .expect("write");
            std::fs::write(v1.join("memory.limit_in_bytes"), "2000000000\n").expect("write");
            assert_eq!(
                cgroup_limit("4:memory:/jobs/a\n0::/\n", root),
                Some(2_000_000_000)
            );
            // Unlimited everywhere: no limit.
            assert_eq!(cgroup_limit("4:memory:/\n", root), None);
            let v2 = root.join("svc/run");
            std::fs::create_dir_all(&v2).expect("mkdir");
            std::fs::write(root.join("svc/memory.max"), "1000000000\n").expect("write");
            std::fs::write(v2.join("memory.max"), "max\n").expect("write");
            assert_eq!(cgroup_limit("0::/svc/run\n", root), Some(1_000_000_000));
            // Both: the smaller.
            assert_eq!(
                cgroup_limit("4:memory:/jobs/a\n0::/svc/run\n", root),
                Some(1_000_000_000)
            );
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sizes_with_units() {
        // SI prefixes are powers of 1000, IEC prefixes (Ki, Mi, ...) powers of 1024
        // (IEC 80000-13).
        let b = |s: &str| parse_size(s).expect(s);
        assert_eq!(b("8G"), BudgetArg::Bytes(8_000_000_000));
        assert_eq!(b("8GB"), BudgetArg::Bytes(8_000_000_000));
        assert_eq!(b("500M"), BudgetArg::Bytes(500_000_000));
        assert_eq!(b("500 mb"), BudgetArg::Bytes(500_000_000));
        assert_eq!(b("2GiB"), BudgetArg::Bytes(2 << 30));
        assert_eq!(b("2gi"), BudgetArg::Bytes(2 << 30));
        assert_eq!(b("1.5G"), BudgetArg::Bytes(1_500_000_000));
        assert_eq!(b("64k"), BudgetArg::Bytes(64_000));
        assert_eq!(b("64KiB"), BudgetArg::Bytes(65_536));
        assert_eq!(b("3Mi"), BudgetArg::Bytes(3 << 20));
        assert_eq!(b("1T"), BudgetArg::Bytes(1_000_000_000_000));
        assert_eq!(b("1TiB"), BudgetArg::Bytes(1 << 40));
        assert_eq!(b("123456"), BudgetArg::Bytes(123_456));
        assert_eq!(b("123456B"), BudgetArg::Bytes(123_456));
        assert_eq!(b(" 7G "), BudgetArg::Bytes(7_000_000_000));
    }

    #[test]
    fn switching_off() {
        for s in ["0", "none", "NONE", "off", "0G", "0.0"] {
            assert_eq!(parse_size(s), Ok(BudgetArg::Off), "{s}");
        }
    }

    #[test]
    fn bad_sizes() {
        for s in [
            "",
            "G",
            "abc",
            "-5G",
            "5X",
            "5 GG",
            "1.5.2G",
            ".5G",
            "5.G",
            "1e9",
            "inf",
            "nan",
            "8 G B",
            "99999999999999999999999T",
        ] {
            assert!(parse_size(s).is_err(), "{s} should not parse");
        }
        let e = parse_size("5X").unwrap_err();
        assert!(e.contains("unknown unit `X`"), "{e}");
    }

    #[test]
    fn default_is_a_share_of_the_smallest_limit() {
        let limits = [
            Limit {
                what: "the available memory (MemAvailable)".into(),
                bytes: 10_000_000_000,
            },
            Limit {
                what: "the address-space limit (ulimit -v)".into(),
                bytes: 1_000_000_000,
            },
        ];
        let b = budget_from_limits(&limits).expect("a budget");
        assert_eq!(b.bytes, 800_000_000);
        assert_eq!(
            b.source,
            "the default, 80% of 1.0 GB, the address-space limit (ulimit -v)"
        );
        assert_eq!(budget_from_limits(&[]), None);
    }

    #[test]
    fn over_budget_names_the_largest_pass() {
        let est = MemoryEstimate::new(1_000_000, vec![5_000_000, 108_000_000]);
        let labels = [
            PassLabel {
                name: "pass 1".into(),
                keys: "postcode + given:first:1".into(),
                window: false,
            },
            PassLabel {
                name: "pass 2".into(),
                keys: "surname:soundex + birth:year".into(),
                window: false,
            },
        ];
        let budget = MemoryBudget {
            bytes: 1_000_000_000,
            source: "--memory-budget 1G".into(),
        };
        let e = budget.check(&est, &labels).unwrap_err();
        assert_eq!(e.kind(), ErrorKind::OverBudget);
        let m = e.to_string();
        assert!(
            m.contains("add a key part to pass 2 (`surname:soundex + birth:year`, 108,000,000 pairs) or raise --memory-budget"),
            "{m}"
        );
        // 20 MB + 4.5 x 1 MB + 64 B x 113M pairs = 7.26 GB.
        assert!(m.contains("7.3 GB"), "{m}");
        assert!(m.contains("1.0 GB (--memory-budget 1G)"), "{m}");
        assert!(m.contains("113,000,000 candidate pairs"), "{m}");
        assert!(!m.contains('\n'));
        let roomy = MemoryBudget {
            bytes: 20_000_000_000,
            source: String::new(),
        };
        assert!(roomy.check(&est, &labels).is_ok());
    }
}
