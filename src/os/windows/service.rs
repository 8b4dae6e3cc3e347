//! The Windows service: registered with the service control manager (install, uninstall,
//! start, stop), and run by it (`service run`). Its Stop and Shutdown controls raise the
//! same `stop` flag the daemon's loop already reads, so a stopped service finishes the
//! frames in hand and flushes the store exactly as a SIGTERM does under systemd.

use std::ffi::{OsStr, OsString};
use std::io;
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{mpsc, Arc, Mutex};
use std::time::Duration;

use windows_service::service::{
    ServiceAccess, ServiceControl, ServiceControlAccept, ServiceErrorControl, ServiceExitCode,
    ServiceInfo, ServiceStartType, ServiceState, ServiceStatus, ServiceType,
};
use windows_service::service_control_handler::{self, ServiceControlHandlerResult};
use windows_service::service_manager::{ServiceManager, ServiceManagerAccess};
use windows_service::{define_windows_service, service_dispatcher};

use crate::os::{Daemon, ServiceError, SERVICE_NAME};

const DESCRIPTION: &str =
    "Watches the capture folders, measures each FITS frame as it lands and mails a morning summary.";
/// How long a stop may take: the daemon waits at most two minutes for frames being read.
const STOP_WAIT: Duration = Duration::from_secs(125);
/// While stopping, the progress reported this often, so the manager sees it is not hung.
const STOP_PULSE: Duration = Duration::from_secs(5);

fn failed(action: &'static str) -> impl FnOnce(windows_service::Error) -> ServiceError {
    move |e| ServiceError::Manager {
        action,
        source: match e {
            windows_service::Error::Winapi(io) => io,
            other => io::Error::other(other.to_string()),
        },
    }
}

fn manager(access: ServiceManagerAccess) -> Result<ServiceManager, ServiceError> {
    ServiceManager::local_computer(None::<&str>, access)
        .map_err(failed("opening the service control manager"))
}

pub fn install(config: &Path) -> Result<(), ServiceError> {
    let program = std::env::current_exe().map_err(|source| ServiceError::Manager {
        action: "finding this program's path",
        source,
    })?;
    let m = manager(ServiceManagerAccess::CONNECT | ServiceManagerAccess::CREATE_SERVICE)?;
    let info = ServiceInfo {
        name: OsString::from(SERVICE_NAME),
        display_name: OsString::from(SERVICE_NAME),
        service_type: ServiceType::OWN_PROCESS,
        start_type: ServiceStartType::AutoStart,
        error_control: ServiceErrorControl::Normal,
        executable_path: program,
        launch_arguments: vec![
            OsString::from("service"),
            OsString::from("run"),
            OsString::from("--config"),
            config.as_os_str().to_owned(),
        ],
        dependencies: vec![],
        // LocalSystem: it reads capture folders whoever made them, and writes only
        // under %ProgramData%\subwatch and where the configuration says.
        account_name: None,
        account_password: None,
    };
    let service = m
        .create_service(&info, ServiceAccess::CHANGE_CONFIG)
        .map_err(failed("registering the service"))?;
    service
        .set_description(DESCRIPTION)
        .map_err(failed("describing the service"))
}

fn open(
    access: ServiceAccess,
    action: &'static str,
) -> Result<windows_service::service::Service, ServiceError> {
    manager(ServiceManagerAccess::CONNECT)?
        .open_service(SERVICE_NAME, access)
        .map_err(failed(action))
}

pub fn uninstall() -> Result<(), ServiceError> {
    let service = open(
        ServiceAccess::QUERY_STATUS | ServiceAccess::STOP | ServiceAccess::DELETE,
        "opening the service",
    )?;
    // Stopped first, so the daemon finishes its frames; the manager removes the entry
    // once the last handle to it closes.
    let running = service
        .query_status()
        .map_err(failed("asking the service's state"))?
        .current_state
        != ServiceState::Stopped;
    if running {
        service.stop().map_err(failed("stopping the service"))?;
    }
    service.delete().map_err(failed("removing the service"))
}

pub fn start() -> Result<(), ServiceError> {
    open(ServiceAccess::START, "opening the service")?
        .start::<&OsStr>(&[])
        .map_err(failed("starting the service"))
}

pub fn stop() -> Result<(), ServiceError> {
    open(ServiceAccess::STOP, "opening the service")?
        .stop()
        .map(|_| ())
        .map_err(failed("stopping the service"))
}

/// The daemon the service runs, handed from `run` to the manager's thread (the entry
/// point the manager calls takes no arguments of ours).
static DAEMON: Mutex<Option<Daemon>> = Mutex::new(None);

pub fn run(daemon: Daemon) -> Result<(), ServiceError> {
    *DAEMON.lock().unwrap_or_else(|p| p.into_inner()) = Some(daemon);
    // Blocks until the service has stopped; the manager calls `service_main` on a
    // thread of its own.
    service_dispatcher::start(SERVICE_NAME, ffi_service_main).map_err(|e| match e {
        windows_service::Error::Winapi(source)
            // ERROR_FAILED_SERVICE_CONTROLLER_CONNECT: started from a console, not by
            // the service control manager.
            if source.raw_os_error() == Some(1063) =>
        {
            ServiceError::NotUnderManager
        }
        other => failed("connecting to the service control manager")(other),
    })
}

define_windows_service!(ffi_service_main, service_main);

/// What the manager's thread waits for.
enum Event {
    StopAsked,
    Ended(Result<(), String>),
}

fn status(state: ServiceState, checkpoint: u32, exit: ServiceExitCode) -> ServiceStatus {
    ServiceStatus {
        service_type: ServiceType::OWN_PROCESS,
        current_state: state,
        controls_accepted: if state == ServiceState::Running {
            ServiceControlAccept::STOP | ServiceControlAccept::SHUTDOWN
        } else {
            ServiceControlAccept::empty()
        },
        exit_code: exit,
        checkpoint,
        wait_hint: if state == ServiceState::StopPending {
            STOP_WAIT
        } else {
            Duration::ZERO
        },
        process_id: None,
    }
}

fn service_main(_arguments: Vec<OsString>) {
    let Some(daemon) = DAEMON.lock().unwrap_or_else(|p| p.into_inner()).take() else {
        return;
    };
    let stop = Arc::new(AtomicBool::new(false));
    let (tx, rx) = mpsc::channel::<Event>();
    let handler = {
        let (stop, tx) = (stop.clone(), tx.clone());
        move |control| match control {
            // The same path as SIGTERM: the daemon's loop sees the flag, finishes the
            // frames in hand and flushes the store.
            ServiceControl::Stop | ServiceControl::Shutdown => {
                stop.store(true, Ordering::Relaxed);
                let _ = tx.send(Event::StopAsked);
                ServiceControlHandlerResult::NoError
            }
            ServiceControl::Interrogate => ServiceControlHandlerResult::NoError,
            _ => ServiceControlHandlerResult::NotImplemented,
        }
    };
    let Ok(handle) = service_control_handler::register(SERVICE_NAME, handler) else {
        tracing::error!("the service control manager refused the service's control handler");
        return;
    };
    let report = |s: ServiceStatus| {
        if let Err(e) = handle.set_service_status(s) {
            tracing::warn!("reporting the service's state: {e}");
        }
    };
    report(status(ServiceState::Running, 0, ServiceExitCode::NO_ERROR));
    let worker = {
        let stop = stop.clone();
        std::thread::spawn(move || {
            // A panic is an end too: the manager must hear the service stopped.
            let ended = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| daemon(stop)))
                .unwrap_or_else(|_| Err("internal error (a bug; please report it)".into()));
            let _ = tx.send(Event::Ended(ended));
        })
    };
    let mut checkpoint = 0;
    let ended = loop {
        match rx.recv_timeout(STOP_PULSE) {
            Ok(Event::Ended(result)) => break result,
            Ok(Event::StopAsked) | Err(mpsc::RecvTimeoutError::Timeout)
                if stop.load(Ordering::Relaxed) =>
            {
                checkpoint += 1;
                report(status(
                    ServiceState::StopPending,
                    checkpoint,
                    ServiceExitCode::NO_ERROR,
                ));
            }
            Ok(Event::StopAsked) | Err(mpsc::RecvTimeoutError::Timeout) => {}
            Err(mpsc::RecvTimeoutError::Disconnected) => {
                break Err("the daemon's thread ended without a word".into())
            }
        }
    };
    let _ = worker.join();
    let exit = match &ended {
        Ok(()) => ServiceExitCode::NO_ERROR,
        Err(e) => {
            tracing::error!("subwatch stopped: {e}");
            // A failure the manager records (and acts on, where recovery is set).
            ServiceExitCode::ServiceSpecific(1)
        }
    };
    report(status(ServiceState::Stopped, 0, exit));
}
