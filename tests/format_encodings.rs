//! The trace format in both encodings: special numbers, optional fields and
//! round trips.

use ebb::trace::{Encoding, PartialRepr, TraceFile, ValueRepr, parse, to_text};

const RON_TRACE: &str = r#"(
  format: 1,
  title: "encodings",
  dtype: f32,
  output: "y",
  seed: 2.0,
  nodes: [
    (id: "x", op: "input", value: (shape: [3], data: [1.0, NaN, -inf]), group: "in"),
    (id: 7, op: "param", value: [inf, 2, "NaN"]),
    (id: "y", op: "soft_clip", inputs: ["x", 7], value: (shape: [3], data: [0.5, 0.5, 0.5]),
     partials: [(diag: [1.0, 2.0, "-inf"]), ()], reported: 3.5, site: "model.rs:12"),
  ],
)"#;

#[test]
fn ron_reads_native_and_string_non_finite_numbers() {
    let file = parse(RON_TRACE, Encoding::Ron).expect("parses");
    let ValueRepr::Tensor { data, .. } = &file.nodes[0].value else {
        panic!("tensor expected")
    };
    assert_eq!(data[0], 1.0);
    assert!(data[1].is_nan());
    assert_eq!(data[2], f64::NEG_INFINITY);
    let ValueRepr::Tensor { shape, data } = &file.nodes[1].value else {
        panic!("tensor expected")
    };
    assert_eq!(shape, &[3]);
    assert_eq!(data[0], f64::INFINITY);
    assert!(data[2].is_nan());
    assert_eq!(file.nodes[1].id.0, "7");
    assert_eq!(file.seed, Some(ValueRepr::Scalar(2.0)));
    assert_eq!(file.nodes[2].reported, Some(ValueRepr::Scalar(3.5)));
    assert_eq!(file.nodes[2].site.as_deref(), Some("model.rs:12"));
    assert!(
        matches!(&file.nodes[2].partials[0], PartialRepr::Diagonal(d) if d[2] == f64::NEG_INFINITY)
    );
    assert_eq!(file.nodes[2].partials[1], PartialRepr::Absent);
}

/// Compares two trace files treating NaN as equal to NaN.
fn same_bits(a: &TraceFile, b: &TraceFile) -> bool {
    format!("{a:?}") == format!("{b:?}")
}

#[test]
fn both_encodings_round_trip_non_finite_values() {
    let file = parse(RON_TRACE, Encoding::Ron).unwrap();
    for encoding in [Encoding::Ron, Encoding::Json] {
        let text = to_text(&file, encoding);
        let back = parse(&text, encoding)
            .unwrap_or_else(|e| panic!("{encoding:?} did not read back: {e:?}\n{text}"));
        assert!(
            same_bits(&file, &back),
            "{encoding:?} changed the trace:\n{text}"
        );
    }
    let json = to_text(&file, Encoding::Json);
    assert!(
        json.contains("\"NaN\"") && json.contains("\"-inf\"") && json.contains("\"inf\""),
        "{json}"
    );
    // The only null is the one derived partial (`()` in RON); no number became null.
    assert_eq!(json.matches("null").count(), 1, "{json}");
}

#[test]
fn json_keeps_every_f64_bit_for_bit() {
    // serde_json's float_roundtrip feature; without it some f64s change on a round trip.
    let mut state = 0x9E37_79B9_7F4A_7C15u64;
    let samples: Vec<f64> = (0..2000)
        .map(|_| {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            f64::from_bits(state)
        })
        .filter(|x| x.is_finite())
        .collect();
    let mut file = parse(RON_TRACE, Encoding::Ron).unwrap();
    file.nodes[0].value = ValueRepr::Tensor {
        shape: vec![samples.len()],
        data: samples.clone(),
    };
    let back = parse(&to_text(&file, Encoding::Json), Encoding::Json).unwrap();
    let ValueRepr::Tensor { data, .. } = &back.nodes[0].value else {
        panic!()
    };
    for (a, b) in samples.iter().zip(data) {
        assert_eq!(a.to_bits(), b.to_bits());
    }
}
