//! The PostgreSQL side of the store's connection: values sent as the column's type and
//! read back as [`Value`]s, `?N` written as `$N`, and one connection on a thread of its
//! own that runs the calls in turn, opened again after the server went away.

use std::collections::HashMap;

use bytes::BytesMut;
use postgres::types::{to_sql_checked, FromSql, IsNull, ToSql, Type};

use super::{DbError, Failure, Row, Value};

type BoxError = Box<dyn std::error::Error + Sync + Send>;

impl ToSql for Value {
    /// Written as the type the server expects at this place: an integer where a number
    /// goes is sent as one, a flag as a boolean, and so on.
    fn to_sql(&self, ty: &Type, out: &mut BytesMut) -> Result<IsNull, BoxError> {
        let mismatch = || -> BoxError { format!("{self:?} cannot be sent as {ty}").into() };
        match (self, ty) {
            (Value::Null, _) => Ok(IsNull::Yes),
            (Value::Int(i), &Type::INT8) => i.to_sql(ty, out),
            (Value::Int(i), &Type::INT4) => i32::try_from(*i)?.to_sql(ty, out),
            (Value::Int(i), &Type::INT2) => i16::try_from(*i)?.to_sql(ty, out),
            (Value::Int(i), &Type::FLOAT8) => (*i as f64).to_sql(ty, out),
            (Value::Int(i), &Type::FLOAT4) => (*i as f32).to_sql(ty, out),
            (Value::Int(i), &Type::BOOL) => (*i != 0).to_sql(ty, out),
            (Value::Int(i), &Type::TEXT | &Type::VARCHAR) => i.to_string().to_sql(ty, out),
            (Value::Real(f), &Type::FLOAT8) => f.to_sql(ty, out),
            (Value::Real(f), &Type::FLOAT4) => (*f as f32).to_sql(ty, out),
            (Value::Real(f), &Type::INT8) if f.fract() == 0.0 && f.abs() < 9.0e18 => {
                (*f as i64).to_sql(ty, out)
            }
            (Value::Real(f), &Type::TEXT | &Type::VARCHAR) => f.to_string().to_sql(ty, out),
            (Value::Text(s), &Type::TEXT | &Type::VARCHAR | &Type::BPCHAR | &Type::NAME) => {
                s.as_str().to_sql(ty, out)
            }
            (Value::Text(s), &Type::UNKNOWN) => s.as_str().to_sql(&Type::TEXT, out),
            (Value::Blob(b), &Type::BYTEA) => b.as_slice().to_sql(ty, out),
            _ => Err(mismatch()),
        }
    }

    fn accepts(_: &Type) -> bool {
        true
    }

    to_sql_checked!();
}

impl<'a> FromSql<'a> for Value {
    fn from_sql(ty: &Type, raw: &'a [u8]) -> Result<Self, BoxError> {
        Ok(match *ty {
            Type::INT8 => Value::Int(i64::from_sql(ty, raw)?),
            Type::INT4 => Value::Int(i32::from_sql(ty, raw)?.into()),
            Type::INT2 => Value::Int(i16::from_sql(ty, raw)?.into()),
            Type::BOOL => Value::Int(bool::from_sql(ty, raw)?.into()),
            Type::FLOAT8 => Value::Real(f64::from_sql(ty, raw)?),
            Type::FLOAT4 => Value::Real(f32::from_sql(ty, raw)?.into()),
            Type::BYTEA => Value::Blob(<&[u8]>::from_sql(ty, raw)?.to_vec()),
            _ => Value::Text(String::from_sql(ty, raw)?),
        })
    }

    fn from_sql_null(_: &Type) -> Result<Self, BoxError> {
        Ok(Value::Null)
    }

    fn accepts(ty: &Type) -> bool {
        matches!(
            *ty,
            Type::INT8
                | Type::INT4
                | Type::INT2
                | Type::BOOL
                | Type::FLOAT8
                | Type::FLOAT4
                | Type::BYTEA
                | Type::TEXT
                | Type::VARCHAR
                | Type::BPCHAR
                | Type::NAME
        )
    }
}

/// `?N` written as PostgreSQL's `$N` (quoted text left alone).
fn postgres_placeholders(sql: &str) -> String {
    let mut out = String::with_capacity(sql.len());
    let mut quoted = false;
    let mut chars = sql.chars().peekable();
    while let Some(c) = chars.next() {
        match c {
            '\'' => quoted = !quoted,
            '?' if !quoted && chars.peek().is_some_and(|d| d.is_ascii_digit()) => {
                out.push('$');
                continue;
            }
            _ => {}
        }
        out.push(c);
    }
    out
}

/// How each connect's settings are made: afresh every time, so that a password file
/// rewritten mid-night (the role's password changed) is read at the next try.
pub type Settings = Box<dyn Fn() -> Result<postgres::Config, String> + Send>;

/// A PostgreSQL connection that comes back after the server went away: a broken
/// connection is opened again at the next call, though never inside a transaction (its
/// first statements went with the old connection). It lives on its connection's thread
/// (see [`PgThread`]).
pub struct PgConn {
    settings: Settings,
    /// TLS to the server, where the address asks for it.
    tls: Option<tokio_postgres_rustls::MakeRustlsConnect>,
    client: Option<postgres::Client>,
    statements: HashMap<String, postgres::Statement>,
    in_transaction: bool,
    /// After a failed connect, calls fail at once until then, with its reason (a server
    /// away is not asked again by every call: each could wait out the connect timeout).
    paused: Option<(std::time::Instant, Failure)>,
}

/// How long a failed connect keeps the next calls from trying again.
const RECONNECT_PAUSE: std::time::Duration = std::time::Duration::from_secs(5);

impl PgConn {
    fn client(&mut self) -> Result<&mut postgres::Client, DbError> {
        let broken = self.client.as_ref().is_none_or(|c| c.is_closed());
        if broken {
            if self.in_transaction {
                return Err(DbError::Broken);
            }
            if let Some((until, failure)) = &self.paused {
                if std::time::Instant::now() < *until {
                    return Err(DbError::Waiting(failure.clone()));
                }
            }
            self.statements.clear();
            self.client = None;
            let connected = (self.settings)()
                .map_err(DbError::Other)
                .and_then(|config| connect(&config, &self.tls).map_err(DbError::from));
            match connected {
                Ok(c) => {
                    self.paused = None;
                    self.client = Some(c);
                }
                Err(e) => {
                    let failure = Failure {
                        reason: e.to_string(),
                        connection: e.is_connection(),
                        login_refused: e.is_login_refused(),
                    };
                    self.paused = Some((std::time::Instant::now() + RECONNECT_PAUSE, failure));
                    return Err(e);
                }
            }
        }
        self.client.as_mut().ok_or(DbError::Broken)
    }

    fn statement(&mut self, sql: &str) -> Result<postgres::Statement, DbError> {
        // Connected first: a new connection has none of the old one's statements.
        self.client()?;
        if let Some(st) = self.statements.get(sql) {
            return Ok(st.clone());
        }
        let st = self.client()?.prepare(&postgres_placeholders(sql))?;
        self.statements.insert(sql.to_string(), st.clone());
        Ok(st)
    }

    /// One statement; the number of rows it changed.
    pub(super) fn execute(&mut self, sql: &str, params: &[Value]) -> Result<u64, DbError> {
        let st = self.statement(sql)?;
        let refs: Vec<&(dyn ToSql + Sync)> =
            params.iter().map(|v| v as &(dyn ToSql + Sync)).collect();
        Ok(self.client()?.execute(&st, &refs)?)
    }

    /// Every row of a query.
    pub(super) fn query(&mut self, sql: &str, params: &[Value]) -> Result<Vec<Row>, DbError> {
        let st = self.statement(sql)?;
        let refs: Vec<&(dyn ToSql + Sync)> =
            params.iter().map(|v| v as &(dyn ToSql + Sync)).collect();
        let rows = self.client()?.query(&st, &refs)?;
        let rows = rows
            .iter()
            .map(|r| {
                (0..r.len())
                    .map(|i| r.try_get::<_, Value>(i))
                    .collect::<Result<Vec<_>, _>>()
                    .map(Row)
            })
            .collect::<Result<Vec<_>, _>>()?;
        Ok(rows)
    }

    /// Statements without parameters; a transaction's begin and end are noted, since
    /// its statements stay on the connection that began it.
    pub(super) fn batch(&mut self, sql: &str) -> Result<(), DbError> {
        let ends = matches!(sql, "COMMIT" | "ROLLBACK");
        let result = self.client().and_then(|c| Ok(c.batch_execute(sql)?));
        if sql.starts_with("BEGIN") && result.is_ok() {
            self.in_transaction = true;
        } else if ends {
            self.in_transaction = false;
        }
        result
    }
}

fn connect(
    config: &postgres::Config,
    tls: &Option<tokio_postgres_rustls::MakeRustlsConnect>,
) -> Result<postgres::Client, postgres::Error> {
    match tls {
        Some(tls) => config.connect(tls.clone()),
        None => config.connect(postgres::NoTls),
    }
}

/// Work for the connection's thread: run with the connection, answered on a channel of
/// its own.
type Job = Box<dyn FnOnce(&mut PgConn) + Send>;

/// One PostgreSQL connection on a thread of its own, for the connection's life, which
/// runs each call in turn. The `postgres` client blocks on a runtime it starts itself,
/// which cannot run on a thread already inside one (the daemon's start-up on tokio's
/// threads, its jobs in `spawn_blocking`): on its own thread it never is, from whichever
/// thread the store is called, and no thread is started per statement.
pub struct PgThread {
    jobs: Option<std::sync::mpsc::Sender<Job>>,
    thread: Option<std::thread::JoinHandle<()>>,
}

impl PgThread {
    /// Connect with `config` on a new thread, which then serves the connection until
    /// this goes (later connects, after a broken one, with the settings `again` makes).
    pub(super) fn open(
        config: postgres::Config,
        again: Settings,
        tls: Option<tokio_postgres_rustls::MakeRustlsConnect>,
    ) -> Result<Self, DbError> {
        let pg = PgConn {
            settings: again,
            tls,
            client: None,
            statements: HashMap::new(),
            in_transaction: false,
            paused: None,
        };
        let (jobs, inbox) = std::sync::mpsc::channel::<Job>();
        let (said, connected) = std::sync::mpsc::sync_channel(1);
        let thread = std::thread::Builder::new()
            .name("subwatch-store".into())
            .spawn(move || {
                let mut pg = pg;
                match connect(&config, &pg.tls) {
                    Ok(client) => {
                        pg.client = Some(client);
                        let _ = said.send(Ok(()));
                    }
                    Err(e) => {
                        let _ = said.send(Err(DbError::from(e)));
                        return;
                    }
                }
                // Until the handle goes; the client then says goodbye to the server here.
                while let Ok(job) = inbox.recv() {
                    job(&mut pg);
                }
            })
            .map_err(|e| DbError::Other(format!("cannot start the connection's thread: {e}")))?;
        let handle = PgThread {
            jobs: Some(jobs),
            thread: Some(thread),
        };
        match connected.recv() {
            Ok(Ok(())) => Ok(handle),
            Ok(Err(e)) => Err(e),
            Err(_) => Err(DbError::Broken),
        }
    }

    /// Run `f` on the connection's thread and wait for its answer. A connection the
    /// server ended is not used again (its client may not know yet): the next call
    /// opens a new one.
    pub(super) fn run<T: Send + 'static>(
        &self,
        f: impl FnOnce(&mut PgConn) -> Result<T, DbError> + Send + 'static,
    ) -> Result<T, DbError> {
        let (answer, answered) = std::sync::mpsc::sync_channel(1);
        let job: Job = Box::new(move |pg| {
            let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                let result = f(pg);
                if result.as_ref().is_err_and(DbError::is_connection) {
                    pg.client = None;
                }
                result
            }));
            let _ = answer.send(result);
        });
        let sent = self.jobs.as_ref().map(|j| j.send(job));
        if !matches!(sent, Some(Ok(()))) {
            return Err(DbError::Broken);
        }
        match answered.recv() {
            Ok(Ok(result)) => result,
            // A panic in the call is the caller's, as if it had run here.
            Ok(Err(panic)) => std::panic::resume_unwind(panic),
            Err(_) => Err(DbError::Broken),
        }
    }
}

impl Drop for PgThread {
    /// The thread ends when its channel closes; waited for, so that the server has
    /// heard the goodbye (and let go of the connection's advisory locks) when this
    /// returns.
    fn drop(&mut self) {
        drop(self.jobs.take());
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn placeholders_become_dollars_outside_quotes() {
        assert_eq!(
            postgres_placeholders("SELECT '?1', x FROM t WHERE a = ?1 AND b IS ?12"),
            "SELECT '?1', x FROM t WHERE a = $1 AND b IS $12"
        );
    }
}
