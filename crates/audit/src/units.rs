//! How the audit names units in prose: 1-based within their layer, runs of three or more as ranges,
//! so a layer of 128 units with 123 flagged reads "units 1–12, 15, 40–128" rather than 123 numbers.
//! JSON keeps the full list in `figures.units`.

/// The units (1-based, any order) as a list of numbers and ranges: `1–3, 5, 7, 8`.
pub fn unit_ranges(units: &[usize]) -> String {
    let mut u = units.to_vec();
    u.sort_unstable();
    u.dedup();
    let mut parts = Vec::new();
    let mut i = 0;
    while i < u.len() {
        let mut j = i;
        while j + 1 < u.len() && u[j + 1] == u[j] + 1 {
            j += 1;
        }
        match j - i {
            0 => parts.push(u[i].to_string()),
            1 => parts.extend([u[i].to_string(), u[j].to_string()]),
            _ => parts.push(format!("{}–{}", u[i], u[j])),
        }
        i = j + 1;
    }
    parts.join(", ")
}

/// "unit 5" or "units 1–12, 15".
pub fn units_phrase(units: &[usize]) -> String {
    if units.len() == 1 {
        format!("unit {}", units[0])
    } else {
        format!("units {}", unit_ranges(units))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn runs_of_three_or_more_become_ranges() {
        let mut flagged: Vec<usize> = (1..=12).collect();
        flagged.push(15);
        flagged.extend(40..=128);
        assert_eq!(unit_ranges(&flagged), "1–12, 15, 40–128");
        assert_eq!(unit_ranges(&[8, 4]), "4, 8");
        assert_eq!(unit_ranges(&[4, 5, 9]), "4, 5, 9");
        assert_eq!(unit_ranges(&[]), "");
        assert_eq!(units_phrase(&[5]), "unit 5");
        assert_eq!(units_phrase(&[1, 2, 3]), "units 1–3");
    }
}
