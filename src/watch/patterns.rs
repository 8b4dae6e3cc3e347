//! Which files are frames: file-name patterns with `*` and `?`, case-insensitive.

/// Whether `name` matches `pattern` (`*` any run, `?` one character), ignoring case.
pub fn glob_match(pattern: &str, name: &str) -> bool {
    let p: Vec<char> = pattern.to_lowercase().chars().collect();
    let n: Vec<char> = name.to_lowercase().chars().collect();
    // Iterative matching with one backtrack point for the last `*`.
    let (mut pi, mut ni) = (0, 0);
    let (mut star, mut mark) = (None, 0);
    while ni < n.len() {
        if pi < p.len() && (p[pi] == '?' || p[pi] == n[ni]) {
            pi += 1;
            ni += 1;
        } else if pi < p.len() && p[pi] == '*' {
            star = Some(pi);
            mark = ni;
            pi += 1;
        } else if let Some(s) = star {
            pi = s + 1;
            mark += 1;
            ni = mark;
        } else {
            return false;
        }
    }
    while pi < p.len() && p[pi] == '*' {
        pi += 1;
    }
    pi == p.len()
}

/// A file is a candidate frame when its name matches an include pattern and no exclude
/// pattern. Hidden files (a leading dot, as capture programs use for partial writes) are
/// never candidates.
pub fn is_candidate(name: &str, include: &[String], exclude: &[String]) -> bool {
    !name.starts_with('.')
        && include.iter().any(|p| glob_match(p, name))
        && !exclude.iter().any(|p| glob_match(p, name))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn patterns() {
        assert!(glob_match("*.fits", "Light_001.FITS"));
        assert!(glob_match("*.fits.gz", "a.fits.gz"));
        assert!(!glob_match("*.fits", "a.fits.tmp"));
        assert!(glob_match("l?ght*", "Light_001.fit"));
        assert!(glob_match("*", ""));
        let inc = vec!["*.fits".to_string()];
        assert!(!is_candidate(".partial.fits", &inc, &[]));
        assert!(!is_candidate("x.fits", &inc, &["x*".to_string()]));
    }
}
