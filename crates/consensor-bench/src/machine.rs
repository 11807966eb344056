//! What machine a benchmark ran on, and how much memory it used at most.

/// A one-line description: CPU model, logical cores, memory.
pub fn describe() -> String {
    let cpuinfo = std::fs::read_to_string("/proc/cpuinfo").unwrap_or_default();
    let model = cpuinfo
        .lines()
        .find_map(|line| line.strip_prefix("model name"))
        .map(|rest| rest.trim_start_matches([' ', '\t', ':']).to_owned())
        .unwrap_or_else(|| "unknown CPU".to_owned());
    let cores = std::thread::available_parallelism().map_or(0, |n| n.get());
    let memory_kib = read_status_kib("/proc/meminfo", "MemTotal:").unwrap_or(0);
    format!(
        "{model}, {cores} logical cores, {:.1} GiB memory",
        memory_kib as f64 / 1024.0 / 1024.0
    )
}

/// The process's peak resident set size in MiB (VmHWM), if the platform reports it.
pub fn peak_rss_mib() -> Option<f64> {
    read_status_kib("/proc/self/status", "VmHWM:").map(|kib| kib as f64 / 1024.0)
}

/// The process's current resident set size in MiB (VmRSS).
pub fn current_rss_mib() -> Option<f64> {
    read_status_kib("/proc/self/status", "VmRSS:").map(|kib| kib as f64 / 1024.0)
}

fn read_status_kib(path: &str, key: &str) -> Option<u64> {
    let text = std::fs::read_to_string(path).ok()?;
    let line = text.lines().find(|line| line.starts_with(key))?;
    line[key.len()..].split_whitespace().next()?.parse().ok()
}
