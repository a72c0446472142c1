//! CSV ingest: turns a delimited text table into a [`Dataset`] for fitting, or into a
//! [`Frame`] laid out by a model's schema for prediction.
//!
//! Reading rules, in short:
//! - the first non-blank line is the header; names are trimmed and must be non-empty and unique;
//! - every cell is trimmed of ASCII whitespace; an empty cell, `NA`, `N/A` or `nan` in any
//!   letter case (`NaN`, `NAN`, ...) is missing;
//! - a feature column is numeric when every non-missing cell is a number, otherwise
//!   categorical (or when the caller names it categorical);
//! - lines holding nothing but whitespace are skipped wherever they appear, so trailing blank
//!   lines do no harm;
//! - errors name the data row (1-based, the first row after the header is row 1), the line in
//!   the file (1-based; `\n`, `\r\n` and a lone `\r` each end a line, so the header is line 1
//!   unless blank lines precede it) and the column, so a person can find the cell.

use std::collections::HashMap;
use std::fmt;
use std::io::Read;

use super::frame::{Column, ColumnKind, Dataset, Feature, Frame, Target, Task, MISSING_CODE};

/// How many column names an "unknown column" message lists before it stops; a header can
/// hold thousands of names and the message must stay readable.
const MAX_LISTED_COLUMNS: usize = 20;

/// Cell text longer than this is cut in error messages: an unclosed quote can swallow the
/// rest of the file into one cell.
const MAX_SHOWN_CELL_CHARS: usize = 40;

/// An integer target with at most this many distinct values is read as class labels.
/// The threshold is common practice for telling codes from measurements, not a figure from
/// a published source.
const MAX_INTEGER_CLASSES: usize = 20;

/// What to read from a CSV file and how.
#[derive(Clone, Debug, PartialEq)]
pub struct CsvOptions {
    /// Name of the column to predict (matched against the trimmed header names).
    pub target: String,
    /// The task; `None` infers it from the target cells with [`infer_task`].
    pub task: Option<Task>,
    /// Feature columns to read as categorical even when every cell is a number
    /// (codes such as postcodes or machine ids). Every name must be in the header. Naming the
    /// target here has no effect: the target is encoded by the task.
    pub categorical: Vec<String>,
    /// Field separator byte, `b','` by default.
    pub delimiter: u8,
    /// Upper limit on data rows; reading stops with [`DataErrorKind::TooManyRows`] at the
    /// first row past it, so an oversized upload is not read to the end.
    pub max_rows: Option<usize>,
    /// Upper limit on header columns (the target included), checked on the header.
    pub max_columns: Option<usize>,
}

impl CsvOptions {
    /// Options for a comma-separated file with the given target, the task inferred, no
    /// forced categorical columns and no size limits.
    pub fn new(target: impl Into<String>) -> CsvOptions {
        CsvOptions {
            target: target.into(),
            task: None,
            categorical: Vec::new(),
            delimiter: b',',
            max_rows: None,
            max_columns: None,
        }
    }
}

/// Why a CSV file could not be read.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum DataErrorKind {
    /// Bytes that are not a table: invalid UTF-8, or the CSV reader gave up.
    Malformed,
    /// A row with more or fewer fields than the header.
    RaggedRow,
    /// Two header names are equal after trimming (or a schema names a column twice).
    DuplicateColumn,
    /// A header name is empty after trimming.
    EmptyColumnName,
    /// The target named in the options is not in the header.
    UnknownTarget,
    /// A column the caller asked for (a categorical name, or a schema column) is not in the
    /// header.
    MissingColumn,
    /// A target cell is missing.
    MissingTarget,
    /// A regression target cell is not a finite number.
    NonFiniteTarget,
    /// A numeric feature cell is not a finite number that fits in f32.
    NonFiniteValue,
    /// A classification target has only one distinct label.
    OneClass,
    /// The input is empty, or has a header and no data rows.
    NoRows,
    /// More data rows than [`CsvOptions::max_rows`].
    TooManyRows,
    /// More header columns than [`CsvOptions::max_columns`].
    TooManyColumns,
    /// The underlying reader failed.
    Io,
}

/// A CSV reading error, located as precisely as the reader knows.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct DataError {
    /// 1-based data row; the first row after the header is row 1. `None` for header errors
    /// and errors about the whole file.
    pub row: Option<u64>,
    /// 1-based line in the file where the record starts; the header is line 1 unless blank
    /// lines precede it.
    pub line: Option<u64>,
    /// The column concerned, by header name.
    pub column: Option<String>,
    /// What went wrong, for callers that branch on it.
    pub kind: DataErrorKind,
    /// What went wrong, for a person; [`Display`](fmt::Display) prefixes the location.
    pub message: String,
}

impl DataError {
    fn new(kind: DataErrorKind, message: impl Into<String>) -> DataError {
        DataError {
            row: None,
            line: None,
            column: None,
            kind,
            message: message.into(),
        }
    }

    fn at(mut self, row: Option<u64>, line: Option<u64>) -> DataError {
        self.row = row;
        self.line = line;
        self
    }

    fn in_column(mut self, column: &str) -> DataError {
        self.column = Some(column.to_string());
        self
    }
}

impl fmt::Display for DataError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let mut located = true;
        match (self.row, self.line) {
            (Some(row), Some(line)) => write!(f, "row {row} (line {line})")?,
            (Some(row), None) => write!(f, "row {row}")?,
            (None, Some(line)) => write!(f, "line {line}")?,
            (None, None) => located = false,
        }
        if let Some(column) = &self.column {
            if located {
                f.write_str(", ")?;
            }
            write!(f, "column '{column}'")?;
            located = true;
        }
        if located {
            f.write_str(": ")?;
        }
        f.write_str(&self.message)
    }
}

impl std::error::Error for DataError {}

/// One feature column as a fitted model expects it.
#[derive(Clone, Debug, PartialEq)]
pub struct SchemaColumn {
    /// Header name to look for.
    pub name: String,
    /// How the column is read.
    pub kind: ColumnKind,
    /// For categorical columns, the levels the model was fitted with; code `i` means
    /// `levels[i]`. Unused for numeric columns.
    pub levels: Vec<String>,
}

/// Whether a trimmed cell is one of the missing markers.
fn is_missing(cell: &str) -> bool {
    // Any letter case of "nan" counts: Rust's float parser accepts every case of it, so a
    // stricter list would let "NAN" through as a NaN value rather than as missing.
    cell.is_empty() || cell == "NA" || cell == "N/A" || cell.eq_ignore_ascii_case("nan")
}

/// Parses a trimmed cell as a number the way the reference library reads a float32 feature.
fn parse_f32(cell: &str) -> Option<f32> {
    // Parse as f64 first, then cast: the reference library reads float64 and casts to float32,
    // and a direct f32 parse can round differently when the decimal lies near the midpoint
    // between two f32 values (double rounding), which would move split thresholds.
    cell.parse::<f64>().ok().map(|v| v as f32)
}

/// Quotes a cell for an error message, cut short when long.
fn show_cell(cell: &str) -> String {
    if cell.chars().count() <= MAX_SHOWN_CELL_CHARS {
        format!("{cell:?}")
    } else {
        let head: String = cell.chars().take(MAX_SHOWN_CELL_CHARS).collect();
        format!("{head:?}... ({} characters)", cell.chars().count())
    }
}

/// Lists header names for a message, stopping after [`MAX_LISTED_COLUMNS`].
fn list_names<'a>(names: impl ExactSizeIterator<Item = &'a str>) -> String {
    let total = names.len();
    let mut out: Vec<String> = names
        .take(MAX_LISTED_COLUMNS)
        .map(|n| format!("'{n}'"))
        .collect();
    if total > MAX_LISTED_COLUMNS {
        out.push(format!("... and {} more", total - MAX_LISTED_COLUMNS));
    }
    if out.is_empty() {
        "(none)".to_string()
    } else {
        out.join(", ")
    }
}

/// Guesses the task from the target's non-missing cells.
///
/// Classify when the cells are not all numbers, when all are `true`/`false` (any letter
/// case), or when all are integers (`3`, `3.0`, `-1`) with at most 20 distinct values;
/// regress otherwise. Cells are trimmed first. An empty slice gives classify, since every
/// rule holds for no cells; readers reject empty targets before asking.
pub fn infer_task(cells: &[&str]) -> Task {
    let mut distinct_integers: Vec<u64> = Vec::new();
    let mut small_integer_set = true;
    for raw in cells {
        // `true`/`false` are no numbers to the parser, so booleans take this exit too.
        let Ok(value) = raw.trim().parse::<f64>() else {
            return Task::Classify;
        };
        if small_integer_set {
            if value.is_finite() && value.fract() == 0.0 {
                // Adding 0.0 turns -0.0 into +0.0 so both count as one value.
                let bits = (value + 0.0).to_bits();
                if !distinct_integers.contains(&bits) {
                    distinct_integers.push(bits);
                    small_integer_set = distinct_integers.len() <= MAX_INTEGER_CLASSES;
                }
            } else {
                small_integer_set = false;
            }
        }
    }
    if small_integer_set {
        Task::Classify
    } else {
        Task::Regress
    }
}

/// Trimmed cell texts of one column, packed into one buffer so a cell costs no allocation.
/// Each cell's length is one byte; a cell of 255 bytes or more keeps 255 there and its length
/// in `long`, so a big table's texts cost about one byte per cell beyond the text itself.
#[derive(Default)]
struct CellTexts {
    text: String,
    lens: Vec<u8>,
    long: Vec<usize>,
}

impl CellTexts {
    fn push(&mut self, cell: &str) {
        self.text.push_str(cell);
        if cell.len() < 255 {
            self.lens.push(cell.len() as u8);
        } else {
            self.lens.push(255);
            self.long.push(cell.len());
        }
    }

    fn len(&self) -> usize {
        self.lens.len()
    }

    /// The cells in order.
    fn iter(&self) -> impl Iterator<Item = &str> + '_ {
        let mut long = self.long.iter();
        let mut start = 0;
        self.lens.iter().map(move |&l| {
            let len = if l == 255 { *long.next().expect("a long length per 255 mark") } else { l as usize };
            let cell = &self.text[start..start + len];
            start += len;
            cell
        })
    }
}

/// Where a cell sits, for an error raised after the whole file is read.
#[derive(Clone, Copy)]
struct CellPlace {
    row: u64,
    line: u64,
}

/// A feature column while the file is read: its kind is known only at the end, so it keeps
/// the texts and, while every cell so far is a number, the parsed values too.
struct PendingColumn {
    name: String,
    texts: CellTexts,
    /// `None` once a non-number is seen or when the caller asked for categorical.
    numbers: Option<Vec<f32>>,
    /// First number that is not finite in f32, and its text; an error only if the column
    /// stays numeric.
    first_non_finite: Option<(CellPlace, String)>,
}

impl PendingColumn {
    fn new(name: String, categorical: bool) -> PendingColumn {
        PendingColumn {
            name,
            texts: CellTexts::default(),
            numbers: if categorical { None } else { Some(Vec::new()) },
            first_non_finite: None,
        }
    }

    fn push(&mut self, cell: &str, place: CellPlace) {
        self.texts.push(cell);
        let Some(numbers) = &mut self.numbers else {
            return;
        };
        if is_missing(cell) {
            numbers.push(f32::NAN);
            return;
        }
        match parse_f32(cell) {
            Some(v) => {
                if !v.is_finite() && self.first_non_finite.is_none() {
                    self.first_non_finite = Some((place, cell.to_string()));
                }
                numbers.push(v);
            }
            None => {
                // One non-number makes the column categorical; the values are no longer needed.
                self.numbers = None;
                self.first_non_finite = None;
            }
        }
    }

    fn finish(self) -> Result<Feature, DataError> {
        if let Some(numbers) = self.numbers {
            if let Some((place, cell)) = self.first_non_finite {
                return Err(non_finite_value(&cell)
                    .at(Some(place.row), Some(place.line))
                    .in_column(&self.name));
            }
            return Ok(Feature {
                name: self.name,
                column: Column::Numeric(numbers),
            });
        }
        let column = encode_first_seen(&self.texts);
        Ok(Feature {
            name: self.name,
            column,
        })
    }
}

/// The error for a cell that parses but is no finite f32.
fn non_finite_value(cell: &str) -> DataError {
    let why = match cell.parse::<f64>() {
        Ok(v) if v.is_nan() => "is not a number value",
        Ok(v) if v.is_infinite() => "is infinite",
        Ok(_) => "is outside the range of 32-bit floats (about ±3.4e38)",
        Err(_) => "is not a number",
    };
    DataError::new(
        DataErrorKind::NonFiniteValue,
        format!("{} {why}; a numeric column needs finite numbers (leave the cell empty if it is unknown)", show_cell(cell)),
    )
}

/// Dictionary-encodes cell texts; levels are the distinct non-missing strings in order of
/// first appearance, so codes are stable for a given file and need no sort.
fn encode_first_seen(texts: &CellTexts) -> Column {
    let mut index: HashMap<&str, u32> = HashMap::new();
    let mut levels: Vec<String> = Vec::new();
    let mut codes = Vec::with_capacity(texts.len());
    for cell in texts.iter() {
        if is_missing(cell) {
            codes.push(MISSING_CODE);
            continue;
        }
        let code = *index.entry(cell).or_insert_with(|| {
            levels.push(cell.to_string());
            (levels.len() - 1) as u32
        });
        codes.push(code);
    }
    Column::Categorical { codes, levels }
}

/// Wraps a `csv` crate error in ours.
fn reader_error(err: ::csv::Error) -> DataError {
    let line = err.position().map(|p| p.line());
    let kind = match err.kind() {
        ::csv::ErrorKind::Io(_) => DataErrorKind::Io,
        _ => DataErrorKind::Malformed,
    };
    DataError::new(kind, format!("could not read the CSV input: {err}")).at(None, line)
}

/// Passes bytes through to the csv crate and counts line breaks, so errors can name the line
/// a record starts on. The crate's own record positions are taken before it skips blank lines
/// and count only `\n`, so after a blank line or in a CRLF file they point at an earlier line.
struct LineCounter<R> {
    inner: R,
    /// Bytes handed out but not yet counted, starting at file offset `kept_start`.
    kept: Vec<u8>,
    kept_start: u64,
    /// How many of `kept` are already counted; dropped on the next read.
    counted: usize,
    /// Line breaks before `kept_start + counted`.
    breaks: u64,
    /// The byte before `kept_start + counted`, to count `\r\n` as one break.
    last: u8,
}

impl<R: Read> LineCounter<R> {
    fn new(inner: R) -> LineCounter<R> {
        LineCounter {
            inner,
            kept: Vec::new(),
            kept_start: 0,
            counted: 0,
            breaks: 0,
            last: 0,
        }
    }

    /// The 1-based line of the record whose reading began at file offset `from`.
    ///
    /// The crate skips `\r` and `\n` bytes before a record, so the record starts at the first
    /// other byte. Offsets only grow between calls, and `from` is never before the previous
    /// record's start, so the bytes needed are still kept.
    fn line_at(&mut self, from: u64) -> u64 {
        let mut i =
            (from.saturating_sub(self.kept_start) as usize).clamp(self.counted, self.kept.len());
        while i < self.kept.len() && matches!(self.kept[i], b'\r' | b'\n') {
            i += 1;
        }
        let mut last = self.last;
        let mut breaks = 0;
        for &b in &self.kept[self.counted..i] {
            breaks += u64::from(b == b'\r' || (b == b'\n' && last != b'\r'));
            last = b;
        }
        self.breaks += breaks;
        self.last = last;
        self.counted = i;
        self.breaks + 1
    }
}

impl<R: Read> Read for LineCounter<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        // Drop what is counted once per chunk rather than once per record.
        self.kept.drain(..self.counted);
        self.kept_start += self.counted as u64;
        self.counted = 0;
        let n = self.inner.read(buf)?;
        self.kept.extend_from_slice(&buf[..n]);
        Ok(n)
    }
}

type CsvReader<R> = ::csv::Reader<LineCounter<R>>;

fn csv_reader<R: Read>(reader: R, delimiter: u8) -> CsvReader<R> {
    // The header is read as an ordinary record so that we check it ourselves, and field counts
    // are left unchecked so a ragged row gets our message rather than the crate's.
    ::csv::ReaderBuilder::new()
        .delimiter(delimiter)
        .has_headers(false)
        .flexible(true)
        .from_reader(LineCounter::new(reader))
}

/// A record holding nothing but whitespace: a blank line, skipped wherever it appears.
fn is_blank(record: &::csv::ByteRecord) -> bool {
    record.len() == 1 && record[0].trim_ascii().is_empty()
}

/// Reads the next non-blank record and the line it starts on; `None` at the end of the input.
fn next_record<R: Read>(
    reader: &mut CsvReader<R>,
    record: &mut ::csv::ByteRecord,
) -> Result<Option<u64>, DataError> {
    loop {
        if !reader.read_byte_record(record).map_err(reader_error)? {
            return Ok(None);
        }
        if !is_blank(record) {
            let from = record.position().map_or(0, |p| p.byte());
            return Ok(Some(reader.get_mut().line_at(from)));
        }
    }
}

/// The header names, trimmed and checked for UTF-8; empty or duplicate names are left to the
/// caller, whose rules differ.
fn read_header<R: Read>(
    reader: &mut CsvReader<R>,
    max_columns: Option<usize>,
) -> Result<(Vec<String>, Option<u64>), DataError> {
    let mut record = ::csv::ByteRecord::new();
    let Some(line) = next_record(reader, &mut record)? else {
        return Err(DataError::new(
            DataErrorKind::NoRows,
            "the input is empty; expected a header row naming the columns",
        ));
    };
    let line = Some(line);
    if let Some(max) = max_columns {
        if record.len() > max {
            return Err(DataError::new(
                DataErrorKind::TooManyColumns,
                format!(
                    "the header has {} columns, more than the limit of {max}",
                    record.len()
                ),
            )
            .at(None, line));
        }
    }
    let mut names = Vec::with_capacity(record.len());
    for (i, field) in record.iter().enumerate() {
        let text = std::str::from_utf8(field).map_err(|e| {
            DataError::new(
                DataErrorKind::Malformed,
                format!(
                    "header name {} is not valid UTF-8 ({e}); save the file as UTF-8",
                    i + 1
                ),
            )
            .at(None, line)
        })?;
        // The csv crate strips a byte-order mark only when it arrives in one read, so strip
        // what is left here; spreadsheet programs often write one.
        let text = if i == 0 {
            text.strip_prefix('\u{feff}').unwrap_or(text)
        } else {
            text
        };
        names.push(text.trim().to_string());
    }
    Ok((names, line))
}

/// Checks that no header name is empty or repeated.
fn check_header_names(names: &[String], line: Option<u64>) -> Result<(), DataError> {
    let mut seen: HashMap<&str, usize> = HashMap::with_capacity(names.len());
    for (i, name) in names.iter().enumerate() {
        if name.is_empty() {
            return Err(DataError::new(
                DataErrorKind::EmptyColumnName,
                format!(
                    "header column {} of {} has no name; every column needs one",
                    i + 1,
                    names.len()
                ),
            )
            .at(None, line));
        }
        if let Some(first) = seen.insert(name, i) {
            return Err(DataError::new(
                DataErrorKind::DuplicateColumn,
                format!(
                    "the name appears twice in the header, as columns {} and {}",
                    first + 1,
                    i + 1
                ),
            )
            .at(None, line)
            .in_column(name));
        }
    }
    Ok(())
}

/// Checks a data record's field count against the header's.
fn check_width(
    record: &::csv::ByteRecord,
    expected: usize,
    row: u64,
    line: Option<u64>,
) -> Result<(), DataError> {
    if record.len() == expected {
        return Ok(());
    }
    let mut message = format!(
        "expected {expected} fields as in the header, found {}",
        record.len()
    );
    if record.iter().any(|f| f.contains(&b'\n')) {
        // A quoted cell that runs across lines usually means a quote was never closed.
        message.push_str("; a cell spans several lines, so a quote may be unclosed");
    }
    Err(DataError::new(DataErrorKind::RaggedRow, message).at(Some(row), line))
}

/// A data cell with ASCII whitespace trimmed, or a Malformed error when it is not UTF-8.
fn cell_text<'a>(
    field: &'a [u8],
    row: u64,
    line: Option<u64>,
    column: &str,
) -> Result<&'a str, DataError> {
    // Trimming bytes before decoding is cheaper than a Unicode-aware trim and covers the
    // spaces, tabs and carriage returns that real files carry.
    match std::str::from_utf8(field.trim_ascii()) {
        Ok(text) => Ok(text),
        Err(e) => Err(DataError::new(
            DataErrorKind::Malformed,
            format!("the cell is not valid UTF-8 ({e}); save the file as UTF-8"),
        )
        .at(Some(row), line)
        .in_column(column)),
    }
}

/// Reads a table whose header names the columns, one of them the target.
///
/// Every other column becomes a feature, in header order. See the module documentation for
/// the reading rules; the target is encoded as class labels (sorted numerically when every
/// label is a number, ties by text; otherwise by byte order) or as finite f64 values.
pub fn read_dataset<R: Read>(reader: R, options: &CsvOptions) -> Result<Dataset, DataError> {
    let (frame, target) = read_table(reader, options, true)?;
    let (target_name, target) = target.expect("a target was asked for");
    Dataset::new(frame, target_name, target)
        .map_err(|e| DataError::new(DataErrorKind::Malformed, e))
}

/// Reads a table without a target: every column is a feature (`options.target` is ignored).
/// Used to check an upload that names no target yet.
pub fn read_frame<R: Read>(reader: R, options: &CsvOptions) -> Result<Frame, DataError> {
    Ok(read_table(reader, options, false)?.0)
}

/// The reading rules shared by [`read_dataset`] and [`read_frame`].
fn read_table<R: Read>(reader: R, options: &CsvOptions, with_target: bool) -> Result<(Frame, Option<(String, Target)>), DataError> {
    let mut reader = csv_reader(reader, options.delimiter);
    let (names, header_line) = read_header(&mut reader, options.max_columns)?;
    check_header_names(&names, header_line)?;

    let target_index = if !with_target {
        usize::MAX
    } else {
        names
        .iter()
        .position(|n| *n == options.target)
        .ok_or_else(|| {
            DataError::new(
                DataErrorKind::UnknownTarget,
                format!(
                    "the target column '{}' is not in the header; the columns are {}",
                    options.target,
                    list_names(names.iter().map(String::as_str))
                ),
            )
            .at(None, header_line)
        })?
    };
    for wanted in &options.categorical {
        if !names.contains(wanted) {
            return Err(DataError::new(
                DataErrorKind::MissingColumn,
                format!(
                    "the column '{wanted}' named as categorical is not in the header; the columns are {}",
                    list_names(names.iter().map(String::as_str))
                ),
            )
            .at(None, header_line));
        }
    }

    let mut pending: Vec<Option<PendingColumn>> = names
        .iter()
        .enumerate()
        .map(|(i, name)| {
            (i != target_index)
                .then(|| PendingColumn::new(name.clone(), options.categorical.contains(name)))
        })
        .collect();
    let mut target_texts = CellTexts::default();
    let mut target_lines: Vec<u64> = Vec::new();

    let mut record = ::csv::ByteRecord::new();
    let mut rows: u64 = 0;
    while let Some(line_no) = next_record(&mut reader, &mut record)? {
        let row = rows + 1;
        let line = Some(line_no);
        if let Some(max) = options.max_rows {
            if row > max as u64 {
                return Err(DataError::new(
                    DataErrorKind::TooManyRows,
                    format!("the file has more than {max} data rows, the limit for one table"),
                )
                .at(Some(row), line));
            }
        }
        check_width(&record, names.len(), row, line)?;
        let place = CellPlace { row, line: line_no };
        for (i, field) in record.iter().enumerate() {
            let cell = cell_text(field, row, line, &names[i])?;
            match &mut pending[i] {
                Some(column) => column.push(cell, place),
                None => {
                    if is_missing(cell) {
                        return Err(DataError::new(
                            DataErrorKind::MissingTarget,
                            format!(
                                "the target cell is missing ({}); every row needs a target value",
                                show_cell(cell)
                            ),
                        )
                        .at(Some(row), line)
                        .in_column(&names[i]));
                    }
                    target_texts.push(cell);
                    target_lines.push(place.line);
                }
            }
        }
        rows = row;
    }
    if rows == 0 {
        return Err(DataError::new(
            DataErrorKind::NoRows,
            "the file has a header but no data rows",
        ));
    }

    let mut features = Vec::with_capacity(names.len());
    for column in pending.into_iter().flatten() {
        features.push(column.finish()?);
    }
    let frame = Frame {
        features,
        rows: rows as usize,
    };
    if !with_target {
        return Ok((frame, None));
    }
    let target_name = names[target_index].clone();
    let target = encode_target(&target_texts, &target_lines, &target_name, options.task)?;
    Ok((frame, Some((target_name, target))))
}

/// Encodes the target cells (none missing) for the given or inferred task.
fn encode_target(
    texts: &CellTexts,
    lines: &[u64],
    name: &str,
    task: Option<Task>,
) -> Result<Target, DataError> {
    let cells: Vec<&str> = texts.iter().collect();
    let task = task.unwrap_or_else(|| infer_task(&cells));
    match task {
        Task::Regress => {
            let mut values = Vec::with_capacity(cells.len());
            for (i, cell) in cells.iter().enumerate() {
                let value = cell.parse::<f64>().ok().filter(|v| v.is_finite());
                let Some(value) = value else {
                    let why = if cell.parse::<f64>().is_ok() {
                        "is not a finite number"
                    } else {
                        "is not a number"
                    };
                    return Err(DataError::new(
                        DataErrorKind::NonFiniteTarget,
                        format!(
                            "{} {why}; a regress target needs a finite number in every row",
                            show_cell(cell)
                        ),
                    )
                    .at(Some(i as u64 + 1), Some(lines[i]))
                    .in_column(name));
                };
                values.push(value);
            }
            Ok(Target::Values(values))
        }
        Task::Classify => {
            let mut labels: Vec<&str> = cells.clone();
            labels.sort_unstable();
            labels.dedup();
            let numeric: Option<Vec<f64>> = labels.iter().map(|l| l.parse::<f64>().ok()).collect();
            if let Some(numbers) = numeric {
                // Numeric labels in numeric order ("9" before "10"), as the reference library
                // orders numeric classes; equal values written differently ("1", "1.0") keep
                // text order.
                let mut order: Vec<usize> = (0..labels.len()).collect();
                order.sort_by(|&a, &b| {
                    numbers[a]
                        .total_cmp(&numbers[b])
                        .then_with(|| labels[a].cmp(labels[b]))
                });
                labels = order.into_iter().map(|i| labels[i]).collect();
            }
            if labels.len() < 2 {
                return Err(DataError::new(
                    DataErrorKind::OneClass,
                    format!(
                        "every one of the {} rows has the label {}; classifying needs at least two classes",
                        cells.len(),
                        show_cell(labels.first().copied().unwrap_or(""))
                    ),
                )
                .in_column(name));
            }
            let index: HashMap<&str, u32> = labels
                .iter()
                .enumerate()
                .map(|(i, l)| (*l, i as u32))
                .collect();
            let codes = cells.iter().map(|c| index[c]).collect();
            Ok(Target::Classes {
                codes,
                labels: labels.into_iter().map(str::to_string).collect(),
            })
        }
    }
}

/// Reads feature columns laid out as a fitted model's schema says, for prediction.
///
/// The header must hold every schema column; extra columns are ignored and the order may
/// differ. The frame's features follow the schema's order. Numeric columns read as in
/// [`read_dataset`]. Categorical columns map each string to its code in the schema's levels;
/// a string the model never saw gets code `levels.len()`, one past the last level, which
/// prediction treats like a missing cell; the levels are not extended. Header names that the
/// schema does not use are not checked, so an unnamed index column does no harm.
pub fn read_frame_with_schema<R: Read>(
    reader: R,
    schema: &[SchemaColumn],
    delimiter: u8,
) -> Result<Frame, DataError> {
    for (i, column) in schema.iter().enumerate() {
        if schema[..i].iter().any(|c| c.name == column.name) {
            return Err(DataError::new(
                DataErrorKind::DuplicateColumn,
                "the model's schema names the column twice",
            )
            .in_column(&column.name));
        }
    }
    let mut reader = csv_reader(reader, delimiter);
    let (names, header_line) = read_header(&mut reader, None)?;

    // For each schema column, the header position it reads from.
    let mut sources = Vec::with_capacity(schema.len());
    let mut absent: Vec<&str> = Vec::new();
    for column in schema {
        let mut found = names
            .iter()
            .enumerate()
            .filter(|(_, n)| **n == column.name)
            .map(|(i, _)| i);
        match (found.next(), found.next()) {
            (Some(i), None) => sources.push(i),
            (Some(_), Some(_)) => return Err(DataError::new(
                DataErrorKind::DuplicateColumn,
                "the name appears more than once in the header, so the model's column is ambiguous",
            )
            .at(None, header_line)
            .in_column(&column.name)),
            (None, _) => absent.push(&column.name),
        }
    }
    if !absent.is_empty() {
        return Err(DataError::new(
            DataErrorKind::MissingColumn,
            format!(
                "the model needs columns the header lacks: {}; the header has {}",
                list_names(absent.into_iter()),
                list_names(names.iter().map(String::as_str))
            ),
        )
        .at(None, header_line));
    }

    let mut columns: Vec<Column> = schema
        .iter()
        .map(|c| match c.kind {
            ColumnKind::Numeric => Column::Numeric(Vec::new()),
            ColumnKind::Categorical => Column::Categorical {
                codes: Vec::new(),
                levels: c.levels.clone(),
            },
        })
        .collect();
    let level_index: Vec<HashMap<&str, u32>> = schema
        .iter()
        .map(|c| {
            c.levels
                .iter()
                .enumerate()
                .map(|(i, l)| (l.as_str(), i as u32))
                .collect()
        })
        .collect();

    let mut record = ::csv::ByteRecord::new();
    let mut rows: u64 = 0;
    while let Some(line_no) = next_record(&mut reader, &mut record)? {
        let row = rows + 1;
        let line = Some(line_no);
        check_width(&record, names.len(), row, line)?;
        for (k, column) in columns.iter_mut().enumerate() {
            let name = &schema[k].name;
            let cell = cell_text(&record[sources[k]], row, line, name)?;
            match column {
                Column::Numeric(values) => {
                    if is_missing(cell) {
                        values.push(f32::NAN);
                        continue;
                    }
                    match parse_f32(cell) {
                        Some(v) if v.is_finite() => values.push(v),
                        _ => {
                            return Err(non_finite_value(cell).at(Some(row), line).in_column(name))
                        }
                    }
                }
                Column::Categorical { codes, levels } => {
                    let code = if is_missing(cell) {
                        MISSING_CODE
                    } else {
                        level_index[k]
                            .get(cell)
                            .copied()
                            .unwrap_or(levels.len() as u32)
                    };
                    codes.push(code);
                }
            }
        }
        rows = row;
    }
    if rows == 0 {
        return Err(DataError::new(
            DataErrorKind::NoRows,
            "the file has a header but no data rows",
        ));
    }
    let features = schema
        .iter()
        .zip(columns)
        .map(|(s, column)| Feature {
            name: s.name.clone(),
            column,
        })
        .collect();
    // Built directly rather than with Frame::new so that a schema with no columns still
    // reports how many rows it read.
    Ok(Frame {
        features,
        rows: rows as usize,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn read(text: &str, target: &str) -> Result<Dataset, DataError> {
        read_dataset(text.as_bytes(), &CsvOptions::new(target))
    }

    fn read_err(text: &str, options: &CsvOptions) -> DataError {
        match read_dataset(text.as_bytes(), options) {
            Ok(d) => panic!("expected an error, read {d:?}"),
            Err(e) => e,
        }
    }

    fn numbers(d: &Dataset, name: &str) -> Vec<f32> {
        match &d.frame.features[d.frame.feature_index(name).unwrap()].column {
            Column::Numeric(v) => v.clone(),
            other => panic!("column {name} is {other:?}"),
        }
    }

    fn categories(d: &Dataset, name: &str) -> (Vec<u32>, Vec<String>) {
        match &d.frame.features[d.frame.feature_index(name).unwrap()].column {
            Column::Categorical { codes, levels } => (codes.clone(), levels.clone()),
            other => panic!("column {name} is {other:?}"),
        }
    }

    fn classes(d: &Dataset) -> (Vec<u32>, Vec<String>) {
        match &d.target {
            Target::Classes { codes, labels } => (codes.clone(), labels.clone()),
            other => panic!("target is {other:?}"),
        }
    }

    /// Gives its bytes one at a time, so the csv crate never sees a whole byte-order mark.
    struct OneByte<'a>(&'a [u8]);

    impl Read for OneByte<'_> {
        fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
            if self.0.is_empty() || buf.is_empty() {
                return Ok(0);
            }
            buf[0] = self.0[0];
            self.0 = &self.0[1..];
            Ok(1)
        }
    }

    /// Fails on every read: stands in for the rest of a file that must not be read.
    struct Broken;

    impl Read for Broken {
        fn read(&mut self, _: &mut [u8]) -> std::io::Result<usize> {
            Err(std::io::Error::other("disk gone"))
        }
    }

    #[test]
    fn reads_kinds_levels_and_target() {
        let d = read(
            "temp, door ,label\n1.5,open,yes\n2,shut,no\n-3e1,open,yes\n",
            "label",
        )
        .unwrap();
        assert_eq!(d.rows(), 3);
        assert_eq!(d.target_name, "label");
        assert_eq!(d.frame.n_features(), 2);
        assert_eq!(numbers(&d, "temp"), vec![1.5, 2.0, -30.0]);
        // Levels in order of first appearance, not sorted.
        assert_eq!(
            categories(&d, "door"),
            (vec![0, 1, 0], vec!["open".to_string(), "shut".to_string()])
        );
        assert_eq!(
            classes(&d),
            (vec![1, 0, 1], vec!["no".to_string(), "yes".to_string()])
        );
        assert_eq!(d.task(), Task::Classify);
    }

    #[test]
    fn target_may_sit_anywhere_and_is_no_feature() {
        let d = read("y,a,b\n1.5,1,x\n2.25,2,y\n", "y").unwrap();
        let names: Vec<&str> = d.frame.features.iter().map(|f| f.name.as_str()).collect();
        assert_eq!(names, ["a", "b"]);
        assert_eq!(d.target, Target::Values(vec![1.5, 2.25]));
    }

    #[test]
    fn missing_markers() {
        let text = "n,c,y\n,,a\n NA ,NA,b\nNaN,NaN,a\nnan,nan,b\nN/A,N/A,a\nNAN,NAN,b\n4,k,a\n";
        let d = read(text, "y").unwrap();
        let n = numbers(&d, "n");
        assert!(n[..6].iter().all(|v| v.is_nan()), "{n:?}");
        assert_eq!(n[6], 4.0);
        let (codes, levels) = categories(&d, "c");
        assert_eq!(
            codes,
            [
                MISSING_CODE,
                MISSING_CODE,
                MISSING_CODE,
                MISSING_CODE,
                MISSING_CODE,
                MISSING_CODE,
                0
            ]
        );
        assert_eq!(levels, ["k"]);
        assert!(d.frame.features[0].column.is_missing(0));
    }

    #[test]
    fn column_kind_inference() {
        let text = "num,mixed,forced,empty,y\n1,1,10,,a\n2,two,20,NA,b\n3,3,10,,a\n";
        let mut options = CsvOptions::new("y");
        options.categorical = vec!["forced".to_string()];
        let d = read_dataset(text.as_bytes(), &options).unwrap();
        assert_eq!(d.frame.features[0].column.kind(), ColumnKind::Numeric);
        // One text cell makes the column categorical, and the numbers keep their spelling.
        assert_eq!(
            categories(&d, "mixed"),
            (
                vec![0, 1, 2],
                vec!["1".to_string(), "two".to_string(), "3".to_string()]
            )
        );
        assert_eq!(
            categories(&d, "forced"),
            (vec![0, 1, 0], vec!["10".to_string(), "20".to_string()])
        );
        // An all-missing column is numeric, all NaN.
        let e = numbers(&d, "empty");
        assert_eq!(e.len(), 3);
        assert!(e.iter().all(|v| v.is_nan()));
    }

    #[test]
    fn infinite_text_in_a_text_column_is_a_level() {
        let d = read("c,y\ninf,a\nhot,b\n", "y").unwrap();
        assert_eq!(categories(&d, "c").1, ["inf", "hot"]);
    }

    #[test]
    fn numbers_go_through_f64_then_f32() {
        let d = read(
            "x,y\n0.1,a\n1.000000059604644776257986737988403547205962240695953369140625,b\n",
            "y",
        )
        .unwrap();
        let x = numbers(&d, "x");
        assert_eq!(x[0], 0.1f64 as f32);
        // This decimal lies just above the midpoint between 1.0f32 and the next f32. Parsed
        // straight to f32 it rounds up; through f64 it first lands on the midpoint, which then
        // rounds to even, 1.0. The reader must give the f64-then-f32 result.
        let cell = "1.000000059604644776257986737988403547205962240695953369140625";
        let direct: f32 = cell.parse().unwrap();
        let via_f64 = cell.parse::<f64>().unwrap() as f32;
        assert_ne!(direct, via_f64, "the case must tell the two paths apart");
        assert_eq!(x[1], via_f64);
        assert_eq!(x[1], 1.0);
    }

    #[test]
    fn infer_task_rules() {
        assert_eq!(infer_task(&["1", "2", "3", "2"]), Task::Classify);
        assert_eq!(infer_task(&["1.0", "2.0", " -1 "]), Task::Classify);
        assert_eq!(infer_task(&["true", "FALSE", "True"]), Task::Classify);
        assert_eq!(infer_task(&["red", "1"]), Task::Classify);
        assert_eq!(infer_task(&["1.5", "2", "3"]), Task::Regress);
        let twenty: Vec<String> = (0..20).map(|i| i.to_string()).collect();
        let twenty: Vec<&str> = twenty.iter().map(String::as_str).collect();
        assert_eq!(infer_task(&twenty), Task::Classify);
        let twenty_one: Vec<String> = (0..21).map(|i| i.to_string()).collect();
        let twenty_one: Vec<&str> = twenty_one.iter().map(String::as_str).collect();
        assert_eq!(infer_task(&twenty_one), Task::Regress);
        // Same value, different spelling: one distinct integer.
        assert_eq!(infer_task(&["0", "-0", "0.0"]), Task::Classify);
    }

    #[test]
    fn numeric_labels_sort_as_numbers() {
        let d = read("x,y\n1,10\n2,9\n3,2\n4,10\n5,-1\n", "y").unwrap();
        assert_eq!(
            classes(&d),
            (
                vec![3, 2, 1, 3, 0],
                vec!["-1".into(), "2".into(), "9".into(), "10".into()]
            )
        );
    }

    #[test]
    fn text_labels_sort_by_bytes_and_equal_numbers_by_text() {
        let d = read("x,y\n1,b\n2,a\n3,B\n", "y").unwrap();
        assert_eq!(classes(&d).1, ["B", "a", "b"]);
        let mut options = CsvOptions::new("y");
        options.task = Some(Task::Classify);
        let d = read_dataset("x,y\n1,1.0\n2,1\n3,0.5\n".as_bytes(), &options).unwrap();
        assert_eq!(
            classes(&d),
            (vec![2, 1, 0], vec!["0.5".into(), "1".into(), "1.0".into()])
        );
    }

    #[test]
    fn explicit_task_overrides_inference() {
        let mut options = CsvOptions::new("y");
        options.task = Some(Task::Regress);
        let d = read_dataset("x,y\n1,1\n2,2\n".as_bytes(), &options).unwrap();
        assert_eq!(d.target, Target::Values(vec![1.0, 2.0]));
        options.task = Some(Task::Classify);
        let d = read_dataset("x,y\n1,1.5\n2,2.5\n".as_bytes(), &options).unwrap();
        assert_eq!(classes(&d).1, ["1.5", "2.5"]);
    }

    #[test]
    fn blank_lines_crlf_and_delimiter() {
        let d = read("a,y\r\n1,x\r\n\r\n2,z\r\n\r\n   \r\n\n", "y").unwrap();
        assert_eq!(d.rows(), 2);
        assert_eq!(numbers(&d, "a"), [1.0, 2.0]);
        let mut options = CsvOptions::new("y");
        options.delimiter = b';';
        let d = read_dataset("a;y\n1,5;p\n2;q\n".as_bytes(), &options).unwrap();
        assert_eq!(categories(&d, "a").1, ["1,5", "2"]);
    }

    #[test]
    fn byte_order_mark_is_stripped() {
        let text = "\u{feff}temp,y\n1,a\n2,b\n";
        let d = read(text, "y").unwrap();
        assert_eq!(d.frame.features[0].name, "temp");
        // Fed one byte at a time the csv crate leaves the mark in place; we must still strip it.
        let d = read_dataset(OneByte(text.as_bytes()), &CsvOptions::new("y")).unwrap();
        assert_eq!(d.frame.features[0].name, "temp");
    }

    #[test]
    fn quoted_cells_and_line_numbers() {
        // The quoted cell spans lines 2-3, so row 2 starts on line 4.
        let text = "a,y\n\"multi\nline\",p\n1,\n";
        let e = read_err(text, &CsvOptions::new("y"));
        assert_eq!(e.kind, DataErrorKind::MissingTarget);
        assert_eq!(
            (e.row, e.line, e.column.as_deref()),
            (Some(2), Some(4), Some("y"))
        );
    }

    #[test]
    fn line_numbers_count_blank_lines_crlf_and_long_cells() {
        let options = CsvOptions::new("y");
        // Two blank lines before the header, one between rows.
        let e = read_err("\n\na,y\n1,p\n\n2,\n", &options);
        assert_eq!(
            (e.kind, e.row, e.line),
            (DataErrorKind::MissingTarget, Some(2), Some(6))
        );
        // The same in a CRLF file, with a quoted cell spanning two lines.
        let e = read_err("\r\n\r\na,y\r\n\"x\r\nz\",p\r\n\r\n2,\r\n", &options);
        assert_eq!(
            (e.kind, e.row, e.line),
            (DataErrorKind::MissingTarget, Some(2), Some(7))
        );
        // Lone carriage returns end lines too.
        let e = read_err("a,y\r1,p\r\r2,\r", &options);
        assert_eq!((e.row, e.line), (Some(2), Some(4)));
        // A cell far longer than the csv crate's read buffer, with line breaks inside.
        let long = "w\n".repeat(20_000);
        let text = format!("a,y\n\"{long}\",p\n3,\n");
        let e = read_err(&text, &options);
        assert_eq!((e.row, e.line), (Some(2), Some(20_003)));
        // The same read a byte at a time.
        let e = read_dataset(OneByte(text.as_bytes()), &options).unwrap_err();
        assert_eq!((e.row, e.line), (Some(2), Some(20_003)));
    }

    #[test]
    fn display_locates_the_cell() {
        let schema = [SchemaColumn {
            name: "temp".into(),
            kind: ColumnKind::Numeric,
            levels: vec![],
        }];
        let mut text = String::from("temp\n");
        for _ in 0..16 {
            text.push_str("1\n");
        }
        text.push_str("abc\n");
        let e = read_frame_with_schema(text.as_bytes(), &schema, b',').unwrap_err();
        assert_eq!(e.kind, DataErrorKind::NonFiniteValue);
        assert!(
            e.to_string()
                .starts_with("row 17 (line 18), column 'temp': \"abc\" is not a number"),
            "{e}"
        );
        let e = DataError::new(DataErrorKind::NoRows, "nothing");
        assert_eq!(e.to_string(), "nothing");
        assert_eq!(e.clone().in_column("c").to_string(), "column 'c': nothing");
        assert_eq!(e.at(None, Some(1)).to_string(), "line 1: nothing");
    }

    #[test]
    fn malformed_utf8_cell_and_header() {
        let e = read_dataset(&b"a,y\n1,p\n\xff\xfe,q\n"[..], &CsvOptions::new("y")).unwrap_err();
        assert_eq!(e.kind, DataErrorKind::Malformed);
        assert_eq!(
            (e.row, e.line, e.column.as_deref()),
            (Some(2), Some(3), Some("a"))
        );
        let e = read_dataset(&b"a,\xc3(\n1,p\n"[..], &CsvOptions::new("y")).unwrap_err();
        assert_eq!(e.kind, DataErrorKind::Malformed);
        assert_eq!((e.row, e.line), (None, Some(1)));
        assert!(e.message.contains("header name 2"), "{e}");
    }

    #[test]
    fn ragged_row() {
        let e = read_err("a,b,y\n1,2,p\n\n1,2\n", &CsvOptions::new("y"));
        assert_eq!(e.kind, DataErrorKind::RaggedRow);
        assert_eq!(
            (e.row, e.line, e.column.as_deref()),
            (Some(2), Some(4), None)
        );
        assert!(
            e.message.contains("expected 3 fields") && e.message.contains("found 2"),
            "{e}"
        );
        let e = read_err("a,y\n1,p,extra\n", &CsvOptions::new("y"));
        assert_eq!(
            (e.kind, e.row, e.line),
            (DataErrorKind::RaggedRow, Some(1), Some(2))
        );
        assert!(e.message.contains("found 3"), "{e}");
        // An unclosed quote swallows the rest of the file; the message says so.
        let e = read_err("a,b,y\n1,\"2,p\n3,4,q\n", &CsvOptions::new("y"));
        assert_eq!((e.kind, e.row), (DataErrorKind::RaggedRow, Some(1)));
        assert!(e.message.contains("quote"), "{e}");
    }

    #[test]
    fn header_name_errors() {
        let e = read_err("a, ,y\n1,2,p\n", &CsvOptions::new("y"));
        assert_eq!(
            (e.kind, e.row, e.line),
            (DataErrorKind::EmptyColumnName, None, Some(1))
        );
        assert!(e.message.contains("column 2 of 3"), "{e}");
        let e = read_err("a,b, a ,y\n1,2,3,p\n", &CsvOptions::new("y"));
        assert_eq!(
            (e.kind, e.row, e.line),
            (DataErrorKind::DuplicateColumn, None, Some(1))
        );
        assert_eq!(e.column.as_deref(), Some("a"));
        assert!(e.message.contains("columns 1 and 3"), "{e}");
    }

    #[test]
    fn unknown_target_lists_columns_briefly() {
        let e = read_err("a,b,c\n1,2,3\n", &CsvOptions::new("label"));
        assert_eq!((e.kind, e.line), (DataErrorKind::UnknownTarget, Some(1)));
        assert!(
            e.message.contains("'label'") && e.message.contains("'a', 'b', 'c'"),
            "{e}"
        );
        let header: Vec<String> = (0..25).map(|i| format!("c{i}")).collect();
        let text = format!("{}\n", header.join(","));
        let e = read_err(&text, &CsvOptions::new("label"));
        assert!(
            e.message.contains("'c19'") && !e.message.contains("'c20'"),
            "{e}"
        );
        assert!(e.message.contains("and 5 more"), "{e}");
    }

    #[test]
    fn unknown_categorical_name() {
        let mut options = CsvOptions::new("y");
        options.categorical = vec!["colour".into()];
        let e = read_err("a,y\n1,p\n", &options);
        assert_eq!((e.kind, e.line), (DataErrorKind::MissingColumn, Some(1)));
        assert!(e.message.contains("'colour'"), "{e}");
    }

    #[test]
    fn missing_target() {
        let e = read_err("a,y\n1,p\n2, NA \n", &CsvOptions::new("y"));
        assert_eq!(e.kind, DataErrorKind::MissingTarget);
        assert_eq!(
            (e.row, e.line, e.column.as_deref()),
            (Some(2), Some(3), Some("y"))
        );
    }

    #[test]
    fn non_finite_target() {
        // Inferred regress: "inf" is a number but not a finite one.
        let e = read_err("a,y\n1,1.5\n2,2.5\n3,inf\n", &CsvOptions::new("y"));
        assert_eq!(e.kind, DataErrorKind::NonFiniteTarget);
        assert_eq!(
            (e.row, e.line, e.column.as_deref()),
            (Some(3), Some(4), Some("y"))
        );
        assert!(e.message.contains("not a finite number"), "{e}");
        let mut options = CsvOptions::new("y");
        options.task = Some(Task::Regress);
        let e = read_err("a,y\n1,1.5\n2,warm\n", &options);
        assert_eq!(e.kind, DataErrorKind::NonFiniteTarget);
        assert_eq!((e.row, e.line), (Some(2), Some(3)));
        assert!(e.message.contains("\"warm\" is not a number"), "{e}");
    }

    #[test]
    fn non_finite_value() {
        let e = read_err("a,b,y\n1,2,p\n2,-inf,q\n3,inf,p\n", &CsvOptions::new("y"));
        assert_eq!(e.kind, DataErrorKind::NonFiniteValue);
        assert_eq!(
            (e.row, e.line, e.column.as_deref()),
            (Some(2), Some(3), Some("b"))
        );
        assert!(e.message.contains("infinite"), "{e}");
        let e = read_err("a,y\n1e39,p\n", &CsvOptions::new("y"));
        assert_eq!(
            (e.kind, e.row, e.line),
            (DataErrorKind::NonFiniteValue, Some(1), Some(2))
        );
        assert!(e.message.contains("32-bit"), "{e}");
        // Within f32 range after rounding: f32::MAX itself is fine.
        let d = read("a,y\n3.4028235e38,p\n1,q\n", "y").unwrap();
        assert_eq!(numbers(&d, "a")[0], f32::MAX);
    }

    #[test]
    fn one_class() {
        let e = read_err("a,y\n1,p\n2,p\n", &CsvOptions::new("y"));
        assert_eq!(
            (e.kind, e.column.as_deref()),
            (DataErrorKind::OneClass, Some("y"))
        );
        assert!(e.message.contains("\"p\""), "{e}");
    }

    #[test]
    fn no_rows() {
        let e = read_err("a,y\n\n", &CsvOptions::new("y"));
        assert_eq!(e.kind, DataErrorKind::NoRows);
        let e = read_err("", &CsvOptions::new("y"));
        assert_eq!(e.kind, DataErrorKind::NoRows);
        assert!(e.message.contains("header"), "{e}");
    }

    #[test]
    fn too_many_rows_stops_early() {
        let mut options = CsvOptions::new("y");
        options.max_rows = Some(2);
        assert_eq!(
            read_dataset("a,y\n1,p\n2,q\n".as_bytes(), &options)
                .unwrap()
                .rows(),
            2
        );
        // The broken tail is never read: the cap fires on row 3 first.
        let input = "a,y\n1,p\n2,q\n3,p\n".as_bytes().chain(Broken);
        let e = read_dataset(input, &options).unwrap_err();
        assert_eq!(
            (e.kind, e.row, e.line),
            (DataErrorKind::TooManyRows, Some(3), Some(4))
        );
    }

    #[test]
    fn too_many_columns() {
        let mut options = CsvOptions::new("y");
        options.max_columns = Some(2);
        assert!(read_dataset("a,y\n1,p\n2,q\n".as_bytes(), &options).is_ok());
        let e = read_dataset("a,b,y\n1,2,p\n".as_bytes().chain(Broken), &options).unwrap_err();
        assert_eq!((e.kind, e.line), (DataErrorKind::TooManyColumns, Some(1)));
        assert!(e.message.contains("3 columns"), "{e}");
    }

    #[test]
    fn io_error() {
        let e =
            read_dataset("a,y\n1,p\n".as_bytes().chain(Broken), &CsvOptions::new("y")).unwrap_err();
        assert_eq!(e.kind, DataErrorKind::Io);
        assert!(e.message.contains("disk gone"), "{e}");
    }

    fn schema() -> Vec<SchemaColumn> {
        vec![
            SchemaColumn {
                name: "door".into(),
                kind: ColumnKind::Categorical,
                levels: vec!["open".into(), "shut".into()],
            },
            SchemaColumn {
                name: "temp".into(),
                kind: ColumnKind::Numeric,
                levels: vec![],
            },
        ]
    }

    #[test]
    fn schema_reading_reorders_ignores_extras_and_marks_unseen() {
        let text = ",temp,extra,door\n0,1.5,x,shut\n1,,y,ajar\n2,0.1,z,\n";
        let frame = read_frame_with_schema(text.as_bytes(), &schema(), b',').unwrap();
        assert_eq!(frame.rows, 3);
        assert_eq!(frame.features[0].name, "door");
        assert_eq!(
            frame.features[0].column,
            Column::Categorical {
                codes: vec![1, 2, MISSING_CODE],
                levels: vec!["open".into(), "shut".into()]
            }
        );
        match &frame.features[1].column {
            Column::Numeric(v) => {
                assert_eq!(v[0], 1.5);
                assert!(v[1].is_nan());
                assert_eq!(v[2], 0.1f64 as f32);
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn schema_errors() {
        let e =
            read_frame_with_schema("temp,other\n1,2\n".as_bytes(), &schema(), b',').unwrap_err();
        assert_eq!((e.kind, e.line), (DataErrorKind::MissingColumn, Some(1)));
        assert!(
            e.message.contains("'door'") && !e.message.contains("lacks: 'door', 'temp'"),
            "{e}"
        );
        let e = read_frame_with_schema("door,temp,door\nopen,1,open\n".as_bytes(), &schema(), b',')
            .unwrap_err();
        assert_eq!(
            (e.kind, e.column.as_deref()),
            (DataErrorKind::DuplicateColumn, Some("door"))
        );
        let e = read_frame_with_schema("door,temp\nopen,1\nshut,inf\n".as_bytes(), &schema(), b',')
            .unwrap_err();
        assert_eq!(
            (e.kind, e.row, e.line, e.column.as_deref()),
            (
                DataErrorKind::NonFiniteValue,
                Some(2),
                Some(3),
                Some("temp")
            )
        );
        let e =
            read_frame_with_schema("door,temp\nopen\n".as_bytes(), &schema(), b',').unwrap_err();
        assert_eq!(
            (e.kind, e.row, e.line),
            (DataErrorKind::RaggedRow, Some(1), Some(2))
        );
        let e = read_frame_with_schema("door,temp\n".as_bytes(), &schema(), b',').unwrap_err();
        assert_eq!(e.kind, DataErrorKind::NoRows);
        let mut twice = schema();
        twice.push(twice[0].clone());
        let e = read_frame_with_schema("door,temp\nopen,1\n".as_bytes(), &twice, b',').unwrap_err();
        assert_eq!(e.kind, DataErrorKind::DuplicateColumn);
    }
}
