//! Checks of the Touchstone reader against values written by the tests themselves from known
//! complex numbers (format definitions of the Touchstone 1.1 specification, from memory: RI is
//! real/imaginary, MA linear magnitude and angle in degrees, DB 20 log10 |S| and angle in
//! degrees) and against the textbook impedance/scattering relations (Pozar, Microwave
//! Engineering, 4th ed., sections 2.3 and 4.3), computed here without the code under test.

use super::*;

fn c(re: f64, im: f64) -> Complex {
    Complex::new(re, im)
}

fn close(a: Complex, b: Complex, tol: f64) -> bool {
    (a - b).norm() <= tol
}

/// A two-port at three frequencies, deliberately non-reciprocal so that S21/S12 mix-ups show.
fn sample() -> Vec<(f64, TwoPort)> {
    vec![
        (
            1.0e9,
            TwoPort {
                s11: c(0.10, 0.20),
                s21: c(0.50, -0.30),
                s12: c(-0.05, 0.02),
                s22: c(0.15, -0.25),
            },
        ),
        (
            2.5e9,
            TwoPort {
                s11: c(-0.20, 0.05),
                s21: c(-0.40, -0.45),
                s12: c(0.03, 0.04),
                s22: c(0.01, 0.30),
            },
        ),
        (
            4.0e9,
            TwoPort {
                s11: c(0.30, -0.10),
                s21: c(-0.55, 0.20),
                s12: c(-0.02, -0.06),
                s22: c(-0.12, -0.08),
            },
        ),
    ]
}

/// Writes one complex number in a Touchstone format with the standard library's own functions.
fn pair(format: &str, z: Complex) -> String {
    let magnitude = z.re.hypot(z.im);
    let degrees = z.im.atan2(z.re).to_degrees();
    match format {
        "RI" => format!("{:.15e} {:.15e}", z.re, z.im),
        "MA" => format!("{:.15e} {:.15e}", magnitude, degrees),
        _ => format!("{:.15e} {:.15e}", 20.0 * magnitude.log10(), degrees),
    }
}

fn v1_text(unit: &str, format: &str, rows: &[(f64, TwoPort)]) -> String {
    let scale = match unit {
        "Hz" => 1.0,
        "kHz" => 1e3,
        "MHz" => 1e6,
        _ => 1e9,
    };
    let mut text = format!("! written by the test\n# {unit} S {format} R 50\n");
    for (f, s) in rows {
        text.push_str(&format!(
            "{} {} {} {} {}\n",
            f / scale,
            pair(format, s.s11),
            pair(format, s.s21),
            pair(format, s.s12),
            pair(format, s.s22)
        ));
    }
    text
}

fn two_port_rows(t: &Touchstone) -> &[TwoPort] {
    match &t.data {
        NetworkData::TwoPort(rows) => rows,
        NetworkData::OnePort(_) => panic!("expected a two-port"),
    }
}

fn assert_same(t: &Touchstone, rows: &[(f64, TwoPort)], tol: f64) {
    assert_eq!(t.frequencies.len(), rows.len());
    for ((f, s), (got_f, got)) in rows.iter().zip(t.frequencies.iter().zip(two_port_rows(t))) {
        assert!((got_f.0 - f).abs() <= f * 1e-12, "{} vs {f}", got_f.0);
        assert!(close(got.s11, s.s11, tol), "S11 {} vs {}", got.s11, s.s11);
        assert!(close(got.s21, s.s21, tol), "S21 {} vs {}", got.s21, s.s21);
        assert!(close(got.s12, s.s12, tol), "S12 {} vs {}", got.s12, s.s12);
        assert!(close(got.s22, s.s22, tol), "S22 {} vs {}", got.s22, s.s22);
    }
}

#[test]
fn every_format_and_frequency_unit_reads_back_the_same_network() {
    let rows = sample();
    for unit in ["Hz", "kHz", "MHz", "GHz"] {
        for format in ["RI", "MA", "DB"] {
            let text = v1_text(unit, format, &rows);
            let t = parse(&text, "sample.s2p").unwrap_or_else(|e| panic!("{unit} {format}: {e}"));
            assert_eq!(t.version, Version::V1);
            assert!(t.notes.is_empty(), "{:?}", t.notes);
            assert_same(&t, &rows, 1e-12);
        }
    }
}

#[test]
fn omitted_option_fields_default_to_ghz_s_ma_50_ohm() {
    // Touchstone 1.1 defaults (from memory): GHz, S, MA, R 50. "1 0.5 90" is 1 GHz, 0.5 at 90 deg.
    let t = parse("#\n1 0.5 90\n2 0.25 -180\n", "load.s1p").unwrap();
    assert_eq!(t.frequencies, vec![Hz(1e9), Hz(2e9)]);
    let NetworkData::OnePort(g) = &t.data else {
        panic!("one-port expected")
    };
    assert!(close(g[0], c(0.0, 0.5), 1e-15));
    assert!(close(g[1], c(-0.25, 0.0), 1e-15));
    assert!(t.notes.is_empty());
}

#[test]
fn keywords_are_case_insensitive_and_comments_go_anywhere() {
    let text = "! header comment\n  # mhz s ri r 50 ! trailing comment\n\n100 0.5 0.0 ! a 6 dB pad\n\t200 0.25 0.0\n";
    let t = parse(text, "PAD.S1P").unwrap();
    assert_eq!(t.frequencies, vec![Hz(100e6), Hz(200e6)]);
}

#[test]
fn a_v1_two_port_record_is_s11_s21_s12_s22() {
    // Touchstone 1.x two-port order (from memory of the specification): S21 before S12.
    let t = parse("# Hz S RI R 50\n1 11 0 21 0 12 0 22 0\n", "order.s2p").unwrap();
    let s = two_port_rows(&t)[0];
    assert_eq!(
        (s.s11.re, s.s21.re, s.s12.re, s.s22.re),
        (11.0, 21.0, 12.0, 22.0)
    );
}

#[test]
fn a_two_port_record_may_continue_over_lines() {
    let rows = sample();
    let one_line = v1_text("GHz", "RI", &rows);
    // Break every record after S21 and again after S12.
    let mut split = String::new();
    for line in one_line.lines() {
        let tokens: Vec<&str> = line.split_whitespace().collect();
        if tokens.len() == 9 {
            split.push_str(&format!(
                "{}\n   {} ! continued\n{}\n",
                tokens[..5].join(" "),
                tokens[5..7].join(" "),
                tokens[7..].join(" ")
            ));
        } else {
            split.push_str(line);
            split.push('\n');
        }
    }
    let a = parse(&one_line, "a.s2p").unwrap();
    let b = parse(&split, "a.s2p").unwrap();
    assert_eq!(a.data, b.data);
    assert_eq!(a.frequencies, b.frequencies);
}

#[test]
fn noise_parameters_after_v1_two_port_data_are_skipped_with_a_note() {
    let mut text = v1_text("GHz", "MA", &sample());
    // Noise block: f, NFmin dB, |Gamma_opt|, angle, Rn/50; the frequency falls back.
    text.push_str("! noise parameters\n1 0.8 0.3 45 0.2\n2 0.9 0.35 60 0.25\n");
    let t = parse(&text, "amp.s2p").unwrap();
    assert_same(&t, &sample(), 1e-12);
    assert_eq!(t.notes.len(), 1);
    assert!(
        t.notes[0].contains("noise parameters on lines"),
        "{:?}",
        t.notes
    );
}

fn v2_text(order: &str, rows: &[(f64, TwoPort)], reference: &str) -> String {
    let mut text = format!(
        "[Version] 2.0\n# GHz S RI R 50\n[Number of Ports] 2\n[Two-Port Data Order] {order}\n\
         [Number of Frequencies] {}\n{reference}[Network Data]\n",
        rows.len()
    );
    for (f, s) in rows {
        let (x, y) = if order == "12_21" {
            (s.s12, s.s21)
        } else {
            (s.s21, s.s12)
        };
        text.push_str(&format!(
            "{} {} {}\n {} {}\n",
            f / 1e9,
            pair("RI", s.s11),
            pair("RI", x),
            pair("RI", y),
            pair("RI", s.s22)
        ));
    }
    text.push_str("[End]\n");
    text
}

#[test]
fn v1_and_v2_of_the_same_network_agree_in_both_data_orders() {
    let rows = sample();
    let v1 = parse(&v1_text("GHz", "RI", &rows), "n.s2p").unwrap();
    for order in ["12_21", "21_12"] {
        let v2 = parse(&v2_text(order, &rows, ""), "n.ts").unwrap();
        assert_eq!(v2.version, Version::V2);
        assert_eq!(v2.frequencies, v1.frequencies);
        assert_same(&v2, &rows, 1e-12);
    }
}

#[test]
fn v2_lower_and_upper_matrices_fill_the_reciprocal_term() {
    let text = "[Version] 2.0\n# Hz S RI\n[Number of Ports] 2\n[Two-Port Data Order] 12_21\n\
                [Number of Frequencies] 1\n[Matrix Format] Lower\n[Network Data]\n5 1 0 2 0 3 0\n[End]\n";
    let lower = parse(text, "recip.s2p").unwrap();
    let s = two_port_rows(&lower)[0];
    assert_eq!(
        (s.s11.re, s.s21.re, s.s12.re, s.s22.re),
        (1.0, 2.0, 2.0, 3.0)
    );
    let upper = parse(&text.replace("Lower", "upper"), "recip.s2p").unwrap();
    assert_eq!(lower.data, upper.data);
}

#[test]
fn v2_information_and_noise_blocks_are_skipped() {
    let rows = sample();
    let text = v2_text(
        "21_12",
        &rows,
        "[Begin Information]\nanything [x]\n[End Information]\n",
    )
    .replace(
        "[End]\n",
        "[Noise Data]\n1 0.8 0.3 45 0.2\n[End]\nafter the end\n",
    );
    let t = parse(&text, "amp.s2p").unwrap();
    assert_same(&t, &rows, 1e-12);
    assert!(
        t.notes.iter().any(|n| n.contains("noise parameters")),
        "{:?}",
        t.notes
    );
}

/// S = (Z - Z0 I)(Z + Z0 I)^-1 for a two-port with the same real Z0 at both ports (Pozar, 4th
/// ed., section 4.3, from memory), written here with explicit 2x2 arithmetic.
fn s_from_z(z: [[Complex; 2]; 2], z0: f64) -> TwoPort {
    let a = [[z[0][0] - z0, z[0][1]], [z[1][0], z[1][1] - z0]];
    let b = [[z[0][0] + z0, z[0][1]], [z[1][0], z[1][1] + z0]];
    let det = b[0][0] * b[1][1] - b[0][1] * b[1][0];
    let inv = [
        [b[1][1] / det, -b[0][1] / det],
        [-b[1][0] / det, b[0][0] / det],
    ];
    let m = |i: usize, j: usize| a[i][0] * inv[0][j] + a[i][1] * inv[1][j];
    TwoPort {
        s11: m(0, 0),
        s12: m(0, 1),
        s21: m(1, 0),
        s22: m(1, 1),
    }
}

#[test]
fn a_75_ohm_one_port_is_renormalised_to_50_ohm() {
    // A 75 ohm resistor measured in a 75 ohm system reflects nothing; at 50 ohm it reflects
    // (75 - 50) / (75 + 50) = 0.2 (reflection coefficient definition, Pozar section 2.3).
    // A short stays a short (-1) whatever the reference.
    let t = parse("# GHz S RI R 75\n1 0 0\n2 -1 0\n", "r75.s1p").unwrap();
    let NetworkData::OnePort(g) = &t.data else {
        panic!()
    };
    assert!(close(g[0], c(0.2, 0.0), 1e-15), "{}", g[0]);
    assert!(close(g[1], c(-1.0, 0.0), 1e-15), "{}", g[1]);
    assert!(t.notes[0].contains("renormalised"), "{:?}", t.notes);
}

#[test]
fn a_two_port_at_another_reference_is_renormalised_like_its_impedance_matrix_says() {
    // A resistive tee (series 20 and 30 ohm arms, 100 ohm shunt) with a reactive arm: its
    // Z-matrix is [[Za + Zc, Zc], [Zc, Zb + Zc]] (circuit analysis). S at 75 ohm goes into the
    // file; what is read must equal S at 50 ohm from the same Z.
    let (za, zb, zc) = (c(20.0, 15.0), c(30.0, -8.0), c(100.0, 0.0));
    let z = [[za + zc, zc], [zc, zb + zc]];
    let at75 = s_from_z(z, 75.0);
    let at50 = s_from_z(z, 50.0);
    let text = v1_text("GHz", "RI", &[(3e9, at75)]).replace("R 50", "R 75");
    let t = parse(&text, "tee.s2p").unwrap();
    assert_same(&t, &[(3e9, at50)], 1e-12);
    // The same through Touchstone 2.0's [Reference] line (values on a continuation line).
    let v2 = parse(
        &v2_text("21_12", &[(3e9, at75)], "[Reference] 75\n 75\n"),
        "tee.ts",
    )
    .unwrap();
    assert_same(&v2, &[(3e9, at50)], 1e-12);
}

fn error(text: &str, file: &str) -> TouchstoneError {
    parse(text, file).expect_err("the file must be refused")
}

#[test]
fn errors_name_the_file_and_the_line() {
    let cases: &[(&str, &str, Option<usize>, &str)] = &[
        ("! c\n# GHz Y RI R 50\n1 0 0\n", "y.s1p", Some(2), "admittance (Y)"),
        ("# GHz Z MA\n", "z.s2p", Some(1), "impedance (Z)"),
        ("# MHz H DB\n", "h.s2p", Some(1), "hybrid-h (H)"),
        ("# kHz g RI\n", "g.s2p", Some(1), "hybrid-g (G)"),
        ("# GHz S XY\n", "u.s1p", Some(1), "unknown option \"XY\""),
        ("# GHz S RI R\n", "r.s1p", Some(1), "`R` on the option line has no value"),
        ("# GHz S RI R -5\n", "r.s1p", Some(1), "not a positive number of ohms"),
        ("# GHz S RI\n1 0 0\n2 0 zero\n", "bad.s1p", Some(3), "\"zero\" is not a number"),
        ("# GHz S RI\n1 0 0\n1 0 0\n", "dup.s1p", Some(3), "frequencies must increase"),
        ("# GHz S RI\n1 0 0 0\n", "long.s1p", Some(2), "4 numbers on one line"),
        ("# GHz S RI\n1e305 0 0\n", "huge.s1p", Some(2), "too large to be a frequency"),
        ("# GHz S DB\n1 1e300 0\n", "db.s1p", Some(2), "not a finite complex number"),
        ("# GHz S RI\n1 0 0 0 0\n", "short.s2p", Some(2), "5 of its 9 numbers"),
        ("1 0 0\n# GHz S RI\n", "early.s1p", Some(1), "data before the option line"),
        ("# GHz S RI\n# GHz S RI\n", "twice.s1p", Some(2), "a second option line"),
        ("# GHz S RI\n[Network Data]\n", "kw.s1p", Some(2), "belongs to Touchstone 2.0"),
        ("# GHz S RI\n", "empty.s1p", None, "no network data"),
        ("# GHz S RI\n1 0 0\n", "three.s3p", None, "3-port file"),
        ("# GHz S RI\n1 0 0\n", "noext.txt", None, "cannot tell the port count"),
        ("[Version] 1.1\n", "v.s2p", Some(1), "[Version] \"1.1\""),
        (
            "[Version] 2.0\n# GHz S RI\n[Number of Ports] 2\n[Number of Frequencies] 1\n[Network Data]\n1 0 0 0 0 0 0 0 0\n[End]\n",
            "order.s2p",
            Some(5),
            "[Two-Port Data Order]",
        ),
        (
            "[Version] 2.0\n# GHz S RI\n[Number of Ports] 1\n[Number of Frequencies] 2\n[Network Data]\n1 0 0\n[End]\n",
            "count.s1p",
            Some(4),
            "says 2 but [Network Data] (line 5) holds 1",
        ),
        (
            "[Version] 2.0\n# GHz S RI\n[Number of Ports] 1\n[Number of Frequencies] 1\n[Network Data]\n1 0 0\n",
            "cut.s1p",
            None,
            "no [End] line",
        ),
        (
            "[Version] 2.0\n# GHz S RI\n[Number of Ports] 2\n[Mixed-Mode Order] D1,2 C1,2\n",
            "mm.ts",
            Some(4),
            "mixed-mode",
        ),
        ("[Version] 2.0\n[Frobnicate] 3\n", "k.ts", Some(2), "unknown keyword [frobnicate]"),
        ("[Version] 2.0\n[Number of Ports] 4\n", "four.ts", Some(2), "4-port file"),
        (
            "[Version] 2.0\n# GHz S RI\n[Number of Ports] 2\n[Reference] 50 75\n[Two-Port Data Order] 12_21\n[Number of Frequencies] 1\n[Network Data]\n1 0 0 0 0 0 0 0 0\n[End]\n",
            "refs.s2p",
            Some(4),
            "differs between ports",
        ),
        (
            "[Version] 2.0\n# GHz S RI\n[Number of Ports] 1\n[Number of Frequencies] 1\n[Network Data]\n1 0 0\n[Reference] 50\n[End]\n",
            "late.s1p",
            Some(7),
            "inside the network data",
        ),
        ("[Version] 2.0\n[Number of Ports] 1\n", "name.s2p", Some(2), "named as a 2-port"),
    ];
    for (text, file, line, needle) in cases {
        let e = error(text, file);
        assert_eq!(&e.file, file, "{e}");
        assert_eq!(e.line, *line, "{file}: {e}");
        let shown = e.to_string();
        assert!(
            shown.contains(needle),
            "{file}: {needle:?} not in {shown:?}"
        );
        assert!(shown.starts_with(file), "{shown}");
        if let Some(l) = line {
            assert!(shown.contains(&format!("line {l}")), "{shown}");
        }
    }
}

#[test]
fn damaged_files_are_refused_or_read_never_a_panic() {
    // Every prefix of a valid file (a transfer cut short) and the file with each line left out
    // or doubled: each is read or refused with the file's name, and nothing panics.
    let files = [
        (
            v1_text("MHz", "DB", &sample()) + "1 0.8 0.3 45 0.2\n",
            "cut.s2p",
        ),
        (
            v2_text("12_21", &sample(), "[Reference] 75\n 75\n")
                .replace("[End]", "[Noise Data]\n1 0.8 0.3 45 0.2\n[End]"),
            "cut.s2p",
        ),
    ];
    for (text, name) in files {
        let mut variants: Vec<String> = (0..=text.len())
            .filter(|i| text.is_char_boundary(*i))
            .map(|i| text[..i].to_string())
            .collect();
        let lines: Vec<&str> = text.lines().collect();
        for i in 0..lines.len() {
            let mut without = lines.clone();
            without.remove(i);
            variants.push(without.join("\n"));
            let mut doubled = lines.clone();
            doubled.insert(i, lines[i]);
            variants.push(doubled.join("\n"));
        }
        for variant in variants {
            let read = std::panic::catch_unwind(|| parse(&variant, name));
            match read {
                Ok(Ok(t)) => assert!(!t.frequencies.is_empty()),
                Ok(Err(e)) => assert!(e.to_string().starts_with(name), "{e}"),
                Err(_) => panic!("the reader panicked on {variant:?}"),
            }
        }
    }
}
