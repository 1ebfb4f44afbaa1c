//! Connections with time limits: a request must be read within
//! [`REQUEST_READ`] of its first byte (a client that drips its headers a
//! byte at a time cannot hold a connection), and a connection with no
//! traffic either way for [`IDLE`] is closed (a live stream sends every
//! half second, so it is never idle).

use std::future::Future;
use std::io;
use std::pin::Pin;
use std::task::{Context, Poll};
use std::time::Duration;
use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::net::{TcpListener, TcpStream};
use tokio::time::{Instant, Sleep};

/// From a request's first byte to the first byte of the answer.
pub const REQUEST_READ: Duration = Duration::from_secs(10);
/// No byte either way.
pub const IDLE: Duration = Duration::from_secs(60);
/// After Ctrl-C has stopped every bay: how long connections that stay
/// open (a browser's stream) are waited for.
pub const CLOSE_GRACE: Duration = Duration::from_secs(3);

/// A TCP listener whose connections carry the limits above.
pub struct TimedListener(TcpListener);

impl TimedListener {
    pub fn new(l: TcpListener) -> TimedListener {
        TimedListener(l)
    }
}

impl axum::serve::Listener for TimedListener {
    type Io = Timed;
    type Addr = std::net::SocketAddr;

    async fn accept(&mut self) -> (Timed, std::net::SocketAddr) {
        loop {
            match self.0.accept().await {
                Ok((s, a)) => return (Timed::new(s), a),
                // Out of descriptors and the like: wait a moment, go on.
                Err(_) => tokio::time::sleep(Duration::from_millis(50)).await,
            }
        }
    }

    fn local_addr(&self) -> io::Result<std::net::SocketAddr> {
        self.0.local_addr()
    }
}

/// A connection with a deadline: [`IDLE`] after its last byte, or
/// [`REQUEST_READ`] after the first byte of a request not yet answered.
pub struct Timed {
    inner: TcpStream,
    /// When the request being read began (none while answering or idle).
    reading_since: Option<Instant>,
    last_traffic: Instant,
    timer: Pin<Box<Sleep>>,
}

impl Timed {
    fn new(inner: TcpStream) -> Timed {
        let now = Instant::now();
        Timed {
            inner,
            reading_since: None,
            last_traffic: now,
            timer: Box::pin(tokio::time::sleep_until(now + IDLE)),
        }
    }

    fn deadline(&self) -> Instant {
        let idle = self.last_traffic + IDLE;
        match self.reading_since {
            Some(t) => idle.min(t + REQUEST_READ),
            None => idle,
        }
    }

    /// While the connection waits: an error once its deadline passes.
    fn expired(&mut self, cx: &mut Context<'_>) -> Option<io::Error> {
        let d = self.deadline();
        if self.timer.deadline() != d {
            self.timer.as_mut().reset(d);
        }
        match self.timer.as_mut().poll(cx) {
            Poll::Ready(()) => Some(io::Error::new(
                io::ErrorKind::TimedOut,
                if self
                    .reading_since
                    .is_some_and(|t| t + REQUEST_READ <= Instant::now())
                {
                    "the request was not read in time"
                } else {
                    "the connection was idle"
                },
            )),
            Poll::Pending => None,
        }
    }
}

impl AsyncRead for Timed {
    fn poll_read(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        let before = buf.filled().len();
        match Pin::new(&mut self.inner).poll_read(cx, buf) {
            Poll::Ready(Ok(())) => {
                if buf.filled().len() > before {
                    let now = Instant::now();
                    self.last_traffic = now;
                    if self.reading_since.is_none() {
                        self.reading_since = Some(now);
                    }
                    if let Some(e) = self.expired(cx) {
                        return Poll::Ready(Err(e));
                    }
                }
                Poll::Ready(Ok(()))
            }
            Poll::Ready(Err(e)) => Poll::Ready(Err(e)),
            Poll::Pending => match self.expired(cx) {
                Some(e) => Poll::Ready(Err(e)),
                None => Poll::Pending,
            },
        }
    }
}

impl AsyncWrite for Timed {
    fn poll_write(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        data: &[u8],
    ) -> Poll<io::Result<usize>> {
        let r = Pin::new(&mut self.inner).poll_write(cx, data);
        if let Poll::Ready(Ok(n)) = &r {
            if *n > 0 {
                // Answering: the request was read.
                self.last_traffic = Instant::now();
                self.reading_since = None;
            }
        }
        r
    }

    fn poll_flush(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_flush(cx)
    }

    fn poll_shutdown(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_shutdown(cx)
    }

    fn poll_write_vectored(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        bufs: &[io::IoSlice<'_>],
    ) -> Poll<io::Result<usize>> {
        let r = Pin::new(&mut self.inner).poll_write_vectored(cx, bufs);
        if let Poll::Ready(Ok(n)) = &r {
            if *n > 0 {
                self.last_traffic = Instant::now();
                self.reading_since = None;
            }
        }
        r
    }

    fn is_write_vectored(&self) -> bool {
        self.inner.is_write_vectored()
    }
}
