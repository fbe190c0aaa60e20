//! Small helpers for the words of messages: counts with the right plural, sizes in bytes, numbers
//! to a few significant digits, and the "did you mean" suggestion for a misspelt name.

/// `n` with its noun: `1 warning`, `2 warnings`; `plural` is the noun's plural form.
pub fn count(n: usize, singular: &str, plural: &str) -> String {
    if n == 1 {
        format!("{n} {singular}")
    } else {
        format!("{n} {plural}")
    }
}

/// A size for people: bytes below 1 KiB, else binary units (KiB = 1024 B, MiB, GiB, TiB, as
/// IEC 80000-13 names them) with one decimal: `0 B`, `512 B`, `1.5 KiB`, `342.5 MiB`.
pub fn bytes(n: u64) -> String {
    const UNITS: [&str; 4] = ["KiB", "MiB", "GiB", "TiB"];
    if n < 1024 {
        return format!("{n} B");
    }
    let mut value = n as f64 / 1024.0;
    let mut unit = 0;
    // Move up while the value would print as 1024.0 or more (1023.95 KiB is `1.0 MiB`).
    while value >= 1023.95 && unit + 1 < UNITS.len() {
        value /= 1024.0;
        unit += 1;
    }
    format!("{value:.1} {}", UNITS[unit])
}

/// `x` to `digits` significant digits (at least 1) for people to read, trailing zeros dropped:
/// `-0.4676`, `1`, `1234`; in exponent form below 0.001 or from 10^6 up (`1.5e-5`,
/// `2.346e7`), so that no value is a long run of zeros. NaN and infinities as Rust writes them.
pub fn number(x: f64, digits: u32) -> String {
    let digits = digits.max(1) as i32;
    if !x.is_finite() {
        return x.to_string();
    }
    if x == 0.0 {
        return "0".into();
    }
    let trim = |s: &str| -> String {
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            s.to_string()
        }
    };
    if (1e-3..1e6).contains(&x.abs()) {
        let decimals = (digits - 1 - x.abs().log10().floor() as i32).max(0) as usize;
        trim(&format!("{x:.decimals$}"))
    } else {
        let text = format!("{x:.prec$e}", prec = (digits - 1) as usize);
        let (mantissa, exponent) = text.split_once('e').unwrap_or((&text, "0"));
        format!("{}e{exponent}", trim(mantissa))
    }
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
    fn counts_take_the_plural_unless_one() {
        assert_eq!(count(0, "warning", "warnings"), "0 warnings");
        assert_eq!(count(1, "warning", "warnings"), "1 warning");
        assert_eq!(count(2, "warning", "warnings"), "2 warnings");
    }

    #[test]
    fn sizes_are_in_binary_units_with_one_decimal() {
        assert_eq!(bytes(0), "0 B");
        assert_eq!(bytes(512), "512 B");
        assert_eq!(bytes(1023), "1023 B");
        assert_eq!(bytes(1024), "1.0 KiB");
        assert_eq!(bytes(1536), "1.5 KiB");
        // 1024 * 1024 - 1 is 1023.999 KiB: it rounds to 1.0 MiB, not 1024.0 KiB.
        assert_eq!(bytes(1024 * 1024 - 1), "1.0 MiB");
        // The review's dry run: 359177852 B / 1024^2 = 342.54... MiB.
        assert_eq!(bytes(359_177_852), "342.5 MiB");
        assert_eq!(bytes(5 << 30), "5.0 GiB");
        assert_eq!(bytes(3 << 40), "3.0 TiB");
        // Above TiB there is no larger unit.
        assert_eq!(bytes(2048 << 40), "2048.0 TiB");
        assert_eq!(bytes(u64::MAX), "16777216.0 TiB");
    }

    #[test]
    fn numbers_keep_a_few_significant_digits() {
        // The review's inspect summary: min -4.6761518716812134e-1, max 1e0.
        assert_eq!(number(-4.676_151_871_681_213_4e-1, 4), "-0.4676");
        assert_eq!(number(1.0, 4), "1");
        assert_eq!(number(0.0, 4), "0");
        assert_eq!(number(1234.5678, 4), "1235");
        assert_eq!(number(123_456.7, 4), "123457");
        assert_eq!(number(0.001_234_56, 4), "0.001235");
        assert_eq!(number(1.5e-5, 4), "1.5e-5");
        assert_eq!(number(-2.345_678e7, 4), "-2.346e7");
        assert_eq!(number(9.999_96, 4), "10");
        assert_eq!(number(f64::NAN, 4), "NaN");
        assert_eq!(number(f64::NEG_INFINITY, 4), "-inf");
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
