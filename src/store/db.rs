//! The store's one connection: an SQLite file or a PostgreSQL server behind the same few
//! calls. Statements are written once, in the SQL both understand (`?N` parameters,
//! `IS NOT DISTINCT FROM`, `ON CONFLICT`, `RETURNING`, `NULLS FIRST`); PostgreSQL gets
//! `$N`. Values cross as one small type that adapts to the column it meets, since
//! PostgreSQL, unlike SQLite, is strict about a parameter's type. PostgreSQL's side (the
//! values in its types, its connection on a thread of its own) is `pg`.

mod pg;

pub use pg::{PgThread, Settings};

/// One value in or out of a statement.
#[derive(Debug, Clone, PartialEq)]
pub enum Value {
    Null,
    Int(i64),
    Real(f64),
    Text(String),
    Blob(Vec<u8>),
}

#[derive(Debug, thiserror::Error)]
pub enum DbError {
    #[error("{0}")]
    Sqlite(#[from] rusqlite::Error),
    /// The server's own words (not chained as a source: the client's Display adds only
    /// "db error").
    #[error("{}", postgres_message(.0))]
    Postgres(postgres::Error),
    #[error("column {index} holds {found:?}, not {expected}")]
    Type {
        index: usize,
        expected: &'static str,
        found: Value,
    },
    #[error("the query returned no row")]
    NoRow,
    #[error("the connection to the database server is broken (tried again within seconds)")]
    Broken,
    /// A connect failed moments ago: calls until the pause ends fail with its reason
    /// rather than asking the server again.
    #[error("{} (tried again within seconds)", .0.reason)]
    Waiting(Failure),
    #[error("{0}")]
    Other(String),
}

impl From<postgres::Error> for DbError {
    fn from(e: postgres::Error) -> Self {
        DbError::Postgres(e)
    }
}

/// Why a connect failed, kept for the calls that wait out the pause after it.
#[derive(Debug, Clone)]
pub struct Failure {
    reason: String,
    connection: bool,
    login_refused: bool,
}

/// Whether the server refused the login itself (PostgreSQL's SQLSTATE class 28,
/// "Invalid Authorization Specification": 28P01 invalid_password, 28000 for a role or
/// host pg_hba.conf does not let in; the PostgreSQL documentation's appendix A): a
/// setting to mend, not a server away.
fn login_refused(e: &postgres::Error) -> bool {
    use postgres::error::SqlState;
    e.code().is_some_and(|c| {
        *c == SqlState::INVALID_PASSWORD || *c == SqlState::INVALID_AUTHORIZATION_SPECIFICATION
    })
}

/// PostgreSQL's own words where the server sent them (the client's Display says only "db error").
fn postgres_message(e: &postgres::Error) -> String {
    match e.as_db_error() {
        Some(db) if login_refused(e) => {
            let name = if db.code().code() == "28P01" {
                "invalid_password"
            } else {
                "invalid_authorization_specification"
            };
            format!(
                "the server refused the login: {} (SQLSTATE {} {name})",
                db.message(),
                db.code().code()
            )
        }
        Some(db) => format!("{}: {}", db.severity(), db.message()),
        None => {
            // The client's own failures say why in their sources (a refused connection,
            // a certificate from an unknown authority).
            let mut text = e.to_string();
            let mut source = std::error::Error::source(e);
            while let Some(s) = source {
                // The system's reason in words, without the number it appends.
                let said = match s.downcast_ref::<std::io::Error>() {
                    Some(io) => crate::text::io_reason(io),
                    None => s.to_string(),
                };
                text.push_str(&format!(": {said}"));
                source = s.source();
            }
            text
        }
    }
}

impl DbError {
    /// Whether the server could not be reached or the connection broke (the store is
    /// away), rather than a statement failing.
    pub fn is_connection(&self) -> bool {
        match self {
            // Classes 08 (connection exception) and 57 (operator intervention: a server
            // shutting down or ending the session) are the server going away.
            DbError::Postgres(e) => match e.as_db_error() {
                // No answer from the server: the client's own failures to connect or to
                // talk (an I/O error, a closed connection, a timeout), not a value it
                // could not convert.
                None => {
                    let text = e.to_string();
                    // A certificate refused is a setting to mend, not a server away.
                    if text.starts_with("error performing TLS handshake") {
                        return false;
                    }
                    e.is_closed()
                        || std::error::Error::source(e).is_some_and(|s| s.is::<std::io::Error>())
                        || text.starts_with("error connecting")
                        || text.starts_with("error communicating")
                        || text.contains("timeout")
                }
                // 57014 is a statement cancelled, not the server going.
                Some(db) => {
                    e.is_closed()
                        || (matches!(&db.code().code()[..2], "08" | "57")
                            && db.code().code() != "57014")
                }
            },
            DbError::Broken => true,
            DbError::Waiting(f) => f.connection,
            _ => false,
        }
    }

    /// Whether the server refused the login (a password that stopped working, a role
    /// or host it does not let in), now or at the connect the calls wait after.
    pub fn is_login_refused(&self) -> bool {
        match self {
            DbError::Postgres(e) => login_refused(e),
            DbError::Waiting(f) => f.login_refused,
            _ => false,
        }
    }
}

/// Anything that can be a statement's parameter.
pub trait IntoValue {
    fn to_value(&self) -> Value;
}

impl<T: IntoValue + ?Sized> IntoValue for &T {
    fn to_value(&self) -> Value {
        (**self).to_value()
    }
}
impl<T: IntoValue> IntoValue for Option<T> {
    fn to_value(&self) -> Value {
        self.as_ref().map_or(Value::Null, IntoValue::to_value)
    }
}
impl IntoValue for Value {
    fn to_value(&self) -> Value {
        self.clone()
    }
}
impl IntoValue for str {
    fn to_value(&self) -> Value {
        Value::Text(self.to_string())
    }
}
impl IntoValue for String {
    fn to_value(&self) -> Value {
        Value::Text(self.clone())
    }
}
impl IntoValue for [u8] {
    fn to_value(&self) -> Value {
        Value::Blob(self.to_vec())
    }
}
impl IntoValue for Vec<u8> {
    fn to_value(&self) -> Value {
        Value::Blob(self.clone())
    }
}
impl IntoValue for f64 {
    /// A value that is not a number is kept as NULL, as SQLite keeps NaN: both back ends
    /// then read back the same. Infinities are numbers to both (the outbox asks for
    /// messages due by +∞).
    fn to_value(&self) -> Value {
        if self.is_nan() {
            Value::Null
        } else {
            Value::Real(*self)
        }
    }
}
impl IntoValue for bool {
    fn to_value(&self) -> Value {
        Value::Int(i64::from(*self))
    }
}
macro_rules! int_values {
    ($($t:ty),*) => {$(
        impl IntoValue for $t {
            fn to_value(&self) -> Value {
                Value::Int(*self as i64)
            }
        }
    )*};
}
int_values!(i64, i32, u32, u64, usize);

/// A statement's parameters: `values![a, b]` borrows each and turns it into a [`Value`].
macro_rules! values {
    ($($v:expr),* $(,)?) => {
        &[$($crate::store::db::IntoValue::to_value(&$v)),*][..]
    };
}
pub(crate) use values;

/// What a column's value reads as.
pub trait FromValue: Sized {
    const NAME: &'static str;
    fn from_value(v: &Value) -> Option<Self>;
}

impl<T: FromValue> FromValue for Option<T> {
    const NAME: &'static str = T::NAME;
    fn from_value(v: &Value) -> Option<Self> {
        match v {
            Value::Null => Some(None),
            v => T::from_value(v).map(Some),
        }
    }
}
impl FromValue for i64 {
    const NAME: &'static str = "an integer";
    fn from_value(v: &Value) -> Option<Self> {
        match v {
            Value::Int(i) => Some(*i),
            _ => None,
        }
    }
}
impl FromValue for f64 {
    const NAME: &'static str = "a number";
    fn from_value(v: &Value) -> Option<Self> {
        match v {
            Value::Real(f) => Some(*f),
            Value::Int(i) => Some(*i as f64),
            _ => None,
        }
    }
}
impl FromValue for bool {
    const NAME: &'static str = "a truth value";
    fn from_value(v: &Value) -> Option<Self> {
        i64::from_value(v).map(|i| i != 0)
    }
}
impl FromValue for String {
    const NAME: &'static str = "text";
    fn from_value(v: &Value) -> Option<Self> {
        match v {
            Value::Text(s) => Some(s.clone()),
            _ => None,
        }
    }
}
impl FromValue for Vec<u8> {
    const NAME: &'static str = "bytes";
    fn from_value(v: &Value) -> Option<Self> {
        match v {
            Value::Blob(b) => Some(b.clone()),
            _ => None,
        }
    }
}

/// One row of a result.
#[derive(Debug, Clone)]
pub struct Row(pub Vec<Value>);

impl Row {
    pub fn get<T: FromValue>(&self, index: usize) -> Result<T, DbError> {
        let v = self.0.get(index).unwrap_or(&Value::Null);
        T::from_value(v).ok_or_else(|| DbError::Type {
            index,
            expected: T::NAME,
            found: v.clone(),
        })
    }
}

impl rusqlite::ToSql for Value {
    fn to_sql(&self) -> rusqlite::Result<rusqlite::types::ToSqlOutput<'_>> {
        use rusqlite::types::{ToSqlOutput, ValueRef};
        Ok(ToSqlOutput::Borrowed(match self {
            Value::Null => ValueRef::Null,
            Value::Int(i) => ValueRef::Integer(*i),
            Value::Real(f) => ValueRef::Real(*f),
            Value::Text(s) => ValueRef::Text(s.as_bytes()),
            Value::Blob(b) => ValueRef::Blob(b),
        }))
    }
}

fn from_sqlite(v: rusqlite::types::ValueRef<'_>) -> Value {
    use rusqlite::types::ValueRef;
    match v {
        ValueRef::Null => Value::Null,
        ValueRef::Integer(i) => Value::Int(i),
        ValueRef::Real(f) => Value::Real(f),
        ValueRef::Text(t) => Value::Text(String::from_utf8_lossy(t).into_owned()),
        ValueRef::Blob(b) => Value::Blob(b.to_vec()),
    }
}

/// Which kind of server a store is.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    Sqlite,
    Postgres,
}

pub enum Conn {
    Sqlite(rusqlite::Connection),
    Postgres(PgThread),
}

impl Conn {
    /// Connect to PostgreSQL with `config` (the first connection; later ones, after a
    /// broken one, with the settings `again` makes).
    pub fn postgres(
        config: postgres::Config,
        again: Settings,
        tls: Option<tokio_postgres_rustls::MakeRustlsConnect>,
    ) -> Result<Self, DbError> {
        Ok(Conn::Postgres(PgThread::open(config, again, tls)?))
    }

    pub fn kind(&self) -> Kind {
        match self {
            Conn::Sqlite(_) => Kind::Sqlite,
            Conn::Postgres(_) => Kind::Postgres,
        }
    }

    /// Run one statement; the number of rows it changed.
    pub fn execute(&self, sql: &str, params: &[Value]) -> Result<u64, DbError> {
        match self {
            Conn::Sqlite(c) => {
                let mut st = c.prepare_cached(sql)?;
                Ok(st.execute(rusqlite::params_from_iter(params))? as u64)
            }
            Conn::Postgres(pg) => {
                let (sql, params) = (sql.to_string(), params.to_vec());
                pg.run(move |pg| pg.execute(&sql, &params))
            }
        }
    }

    /// [`Conn::execute`] of a statement and values made for it, handed over as they are.
    fn execute_owned(&self, sql: String, params: Vec<Value>) -> Result<u64, DbError> {
        match self {
            Conn::Sqlite(_) => self.execute(&sql, &params),
            Conn::Postgres(pg) => pg.run(move |pg| pg.execute(&sql, &params)),
        }
    }

    /// Insert `rows` (each one value per column) into `table`, many rows a statement:
    /// a frame's hundreds of stars in a few round trips to a server, not hundreds.
    pub fn insert_rows(
        &self,
        table: &str,
        columns: &[&str],
        rows: &[Vec<Value>],
    ) -> Result<(), DbError> {
        const ROWS_PER_STATEMENT: usize = 64;
        let n = columns.len();
        for chunk in rows.chunks(ROWS_PER_STATEMENT) {
            let tuples: Vec<String> = (0..chunk.len())
                .map(|r| {
                    let p: Vec<String> = (1..=n).map(|c| format!("?{}", r * n + c)).collect();
                    format!("({})", p.join(", "))
                })
                .collect();
            let sql = format!(
                "INSERT INTO {table} ({}) VALUES {}",
                columns.join(", "),
                tuples.join(", ")
            );
            let params: Vec<Value> = chunk.iter().flatten().cloned().collect();
            self.execute_owned(sql, params)?;
        }
        Ok(())
    }

    /// Every row of a query.
    pub fn query(&self, sql: &str, params: &[Value]) -> Result<Vec<Row>, DbError> {
        match self {
            Conn::Sqlite(c) => {
                let mut st = c.prepare_cached(sql)?;
                let n = st.column_count();
                let mut rows = st.query(rusqlite::params_from_iter(params))?;
                let mut out = Vec::new();
                while let Some(r) = rows.next()? {
                    let mut row = Vec::with_capacity(n);
                    for i in 0..n {
                        row.push(from_sqlite(r.get_ref(i)?));
                    }
                    out.push(Row(row));
                }
                Ok(out)
            }
            Conn::Postgres(pg) => {
                let (sql, params) = (sql.to_string(), params.to_vec());
                pg.run(move |pg| pg.query(&sql, &params))
            }
        }
    }

    /// The first row of a query, if there is one.
    pub fn query_opt(&self, sql: &str, params: &[Value]) -> Result<Option<Row>, DbError> {
        Ok(self.query(sql, params)?.into_iter().next())
    }

    /// The first row of a query that always returns one (an aggregate).
    pub fn query_one(&self, sql: &str, params: &[Value]) -> Result<Row, DbError> {
        self.query_opt(sql, params)?.ok_or(DbError::NoRow)
    }

    /// Statements without parameters, separated by semicolons.
    pub fn batch(&self, sql: &str) -> Result<(), DbError> {
        match self {
            Conn::Sqlite(c) => Ok(c.execute_batch(sql)?),
            Conn::Postgres(pg) => {
                let sql = sql.to_string();
                pg.run(move |pg| pg.batch(&sql))
            }
        }
    }

    /// Run `f` in one transaction: committed when it returns Ok, rolled back otherwise.
    pub fn transaction<T, E: From<DbError>>(
        &self,
        f: impl FnOnce() -> Result<T, E>,
    ) -> Result<T, E> {
        // SQLite takes the write lock at the start (waiting up to the busy timeout for
        // another writer: an archive beside the daemon), instead of failing at once
        // when a read inside turns into a write after another process wrote.
        let begin = match self {
            Conn::Sqlite(c) if !c.is_readonly(rusqlite::MAIN_DB).unwrap_or(true) => {
                "BEGIN IMMEDIATE"
            }
            _ => "BEGIN",
        };
        self.batch(begin)?;
        match f() {
            Ok(v) => {
                if let Err(e) = self.batch("COMMIT") {
                    let _ = self.batch("ROLLBACK");
                    return Err(e.into());
                }
                Ok(v)
            }
            Err(e) => {
                let _ = self.batch("ROLLBACK");
                Err(e)
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn values_round_trip_through_sqlite() {
        let c = Conn::Sqlite(rusqlite::Connection::open_in_memory().unwrap());
        c.batch("CREATE TABLE t (i INTEGER, r REAL, s TEXT, b BLOB)")
            .unwrap();
        let blob = vec![0u8, 1, 255];
        c.execute(
            "INSERT INTO t VALUES (?1, ?2, ?3, ?4)",
            values![7usize, 2.5, "x", blob],
        )
        .unwrap();
        c.execute(
            "INSERT INTO t VALUES (?1, ?2, ?3, ?4)",
            values![None::<i64>, None::<f64>, None::<&str>, None::<Vec<u8>>],
        )
        .unwrap();
        let rows = c
            .query("SELECT i, r, s, b FROM t ORDER BY i NULLS LAST", &[])
            .unwrap();
        assert_eq!(rows[0].get::<i64>(0).unwrap(), 7);
        assert_eq!(rows[0].get::<f64>(1).unwrap(), 2.5);
        assert_eq!(rows[0].get::<String>(2).unwrap(), "x");
        assert_eq!(rows[0].get::<Vec<u8>>(3).unwrap(), blob);
        assert_eq!(rows[1].get::<Option<f64>>(1).unwrap(), None);
        assert!(rows[1].get::<f64>(1).is_err());
        // A failed transaction leaves nothing behind.
        let failed: Result<(), DbError> = c.transaction(|| {
            c.execute("DELETE FROM t", &[])?;
            Err(DbError::NoRow)
        });
        assert!(failed.is_err());
        assert_eq!(
            c.query_one("SELECT COUNT(*) FROM t", &[])
                .unwrap()
                .get::<i64>(0)
                .unwrap(),
            2
        );
    }
}
