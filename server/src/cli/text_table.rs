//! The CLI's tables for people: columns as wide as their widest cell, so a long serial number or
//! model name moves its whole column instead of pushing the rest of its row out of line.
//!
//! Two spaces separate columns; the last column is not padded (no trailing blanks). Widths count
//! characters, not bytes, so a name with a non-ASCII letter lines up too.

/// How a column's cells sit in its width.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Align {
    Left,
    /// Numbers (run ids, counts): right-aligned, so their digits line up.
    Right,
}

/// A table built row by row and rendered once every width is known.
#[derive(Debug, Clone)]
pub struct TextTable {
    headers: Vec<String>,
    align: Vec<Align>,
    rows: Vec<Vec<String>>,
}

impl TextTable {
    /// A table with these column headers and alignments.
    pub fn new(columns: &[(&str, Align)]) -> TextTable {
        TextTable {
            headers: columns.iter().map(|(h, _)| (*h).to_string()).collect(),
            align: columns.iter().map(|(_, a)| *a).collect(),
            rows: Vec::new(),
        }
    }

    /// Adds a row; missing cells are blank, extra cells are dropped.
    pub fn row(&mut self, cells: Vec<String>) {
        let mut cells = cells;
        cells.resize(self.headers.len(), String::new());
        self.rows.push(cells);
    }

    /// The header line and every row, each ending in a newline.
    pub fn render(&self) -> String {
        let columns = self.headers.len();
        let mut widths = vec![0usize; columns];
        for line in std::iter::once(&self.headers).chain(&self.rows) {
            for (width, cell) in widths.iter_mut().zip(line) {
                *width = (*width).max(cell.chars().count());
            }
        }
        let mut out = String::new();
        for line in std::iter::once(&self.headers).chain(&self.rows) {
            let mut text = String::new();
            for (column, cell) in line.iter().enumerate() {
                if column > 0 {
                    text.push_str("  ");
                }
                let pad = widths[column] - cell.chars().count();
                let last = column + 1 == columns;
                match self.align[column] {
                    Align::Right => {
                        text.extend(std::iter::repeat_n(' ', pad));
                        text.push_str(cell);
                    }
                    Align::Left => {
                        text.push_str(cell);
                        if !last {
                            text.extend(std::iter::repeat_n(' ', pad));
                        }
                    }
                }
            }
            out.push_str(text.trim_end());
            out.push('\n');
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The character offset at which `needle` starts on `line`.
    fn column_of(line: &str, needle: &str) -> usize {
        let byte = line
            .find(needle)
            .unwrap_or_else(|| panic!("{needle} not in {line}"));
        line[..byte].chars().count()
    }

    #[test]
    fn a_long_cell_moves_its_column_not_the_rest_of_its_row() {
        let mut table = TextTable::new(&[
            ("run", Align::Right),
            ("serial", Align::Left),
            ("model", Align::Left),
            ("by", Align::Left),
        ]);
        table.row(vec![
            "7".into(),
            "EG-PM-0042".into(),
            "thin-film phase modulator with a long name".into(),
            "lab-b".into(),
        ]);
        table.row(vec![
            "12".into(),
            "µ-PM-1".into(),
            "short".into(),
            "me".into(),
        ]);
        let text = table.render();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines.len(), 3, "{text}");
        // Every row's last column starts where its header does.
        let by = column_of(lines[0], "by");
        assert_eq!(column_of(lines[1], "lab-b"), by, "{text}");
        assert_eq!(column_of(lines[2], "me"), by, "{text}");
        let model = column_of(lines[0], "model");
        assert_eq!(column_of(lines[2], "short"), model, "{text}");
        // Numbers end in the same column; no line ends in blanks.
        assert_eq!(
            column_of(lines[1], "7") + 1,
            column_of(lines[2], "12") + 2,
            "{text}"
        );
        assert!(lines.iter().all(|l| !l.ends_with(' ')), "{text:?}");
    }

    #[test]
    fn missing_cells_are_blank() {
        let mut table = TextTable::new(&[("a", Align::Left), ("b", Align::Left)]);
        table.row(vec!["only".into()]);
        assert_eq!(table.render(), "a     b\nonly\n");
    }
}
