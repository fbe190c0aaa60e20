//! Small helpers for the words of messages: counts with the right plural, and the "did you mean"
//! suggestion for a misspelt name.

/// `n` with its noun: `1 warning`, `2 warnings`; `plural` is the noun's plural form.
pub fn count(n: usize, singular: &str, plural: &str) -> String {
    if n == 1 {
        format!("{n} {singular}")
    } else {
        format!("{n} {plural}")
    }
}

/// A size in binary units with one decimal: `0 B`, `512 B`, `1.5 KiB`, `41.2 GiB`.
pub fn bytes(n: u64) -> String {
    const UNITS: [&str; 4] = ["KiB", "MiB", "GiB", "TiB"];
    if n < 1024 {
        return format!("{n} B");
    }
    let mut value = n as f64 / 1024.0;
    let mut unit = 0;
    while value >= 1024.0 && unit + 1 < UNITS.len() {
        value /= 1024.0;
        unit += 1;
    }
    format!("{value:.1} {}", UNITS[unit])
}

/// The candidate closest to `word`, when it is close enough to be a likely misspelling.
///
/// Closeness is the Damerau–Levenshtein distance (an edit is an insertion, deletion,
/// substitution or swap of two neighbouring characters), compared case-insensitively. A
/// candidate is offered when at most a third of the longer name's characters differ (at least
/// one edit is always allowed), so `cycels` finds `cycles` but `x` does not find `export`; ties
/// go to the earlier candidate, so the answer depends on nothing but the list's order. The
/// candidate equal to `word` is skipped: the caller asks because `word` was not found.
pub fn closest<'c>(word: &str, candidates: impl IntoIterator<Item = &'c str>) -> Option<&'c str> {
    let lower = word.to_lowercase();
    let mut best: Option<(usize, &str)> = None;
    for candidate in candidates {
        let d = strsim::damerau_levenshtein(&lower, &candidate.to_lowercase());
        let longer = word.chars().count().max(candidate.chars().count());
        let allowed = (longer / 3).max(1);
        // An exact match is no misspelling; one that differs in case only is (`Data`).
        if candidate == word || d > allowed {
            continue;
        }
        if best.is_none_or(|(bd, _)| d < bd) {
            best = Some((d, candidate));
        }
    }
    best.map(|(_, c)| c)
}

/// `; did you mean `x`?` for the closest candidate, or nothing.
pub fn did_you_mean<'c>(word: &str, candidates: impl IntoIterator<Item = &'c str>) -> String {
    closest(word, candidates)
        .map(|c| format!("; did you mean `{c}`?"))
        .unwrap_or_default()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sizes_are_in_binary_units_with_one_decimal() {
        // IEC 80000-13 binary prefixes: 1 KiB = 1024 B.
        assert_eq!(bytes(0), "0 B");
        assert_eq!(bytes(512), "512 B");
        assert_eq!(bytes(1536), "1.5 KiB");
        assert_eq!(bytes(359_177_852), "342.5 MiB");
        assert_eq!(bytes(41 << 30), "41.0 GiB");
        assert_eq!(bytes(3 << 40), "3.0 TiB");
        assert_eq!(bytes(5000 << 40), "5000.0 TiB");
    }

    #[test]
    fn counts_take_the_plural_unless_one() {
        assert_eq!(count(0, "warning", "warnings"), "0 warnings");
        assert_eq!(count(1, "warning", "warnings"), "1 warning");
        assert_eq!(count(2, "warning", "warnings"), "2 warnings");
    }

    #[test]
    fn the_closest_name_is_offered_only_when_close() {
        let keys = ["name", "data", "output", "stages", "report"];
        assert_eq!(closest("outptu", keys), Some("output"));
        assert_eq!(closest("stage", keys), Some("stages"));
        assert_eq!(closest("Data", keys), Some("data"));
        assert_eq!(closest("zzzzzz", keys), None);
        assert_eq!(closest("x", ["export"]), None);
        // An exact match is not a misspelling.
        assert_eq!(closest("data", keys), None);
        assert_eq!(closest("cohrence", ["plv", "ppc", "icoh"]), None);
        assert_eq!(
            closest("wpl", ["plv", "ppc", "wpli", "dwpli"]),
            Some("wpli")
        );
        assert_eq!(
            did_you_mean("re-refernce", ["notch", "re-reference"]),
            "; did you mean `re-reference`?"
        );
        assert_eq!(did_you_mean("qqq", ["notch"]), "");
    }
}
