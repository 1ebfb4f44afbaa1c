//! Links are byte streams: serial, TCP and in-memory are interchangeable
//! below the SCPI session. This file holds the in-memory link, which hands
//! each complete line to a responder (the simulated instruments) and
//! queues its reply for reading, with no task switch, and the shared link
//! through which the two roles of one source-sink instrument speak.

use std::collections::VecDeque;
use std::future::Future;
use std::io;
use std::pin::Pin;
use std::sync::{Arc, Mutex};
use std::task::{Context, Poll, Waker};
use std::time::Duration;
use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::time::{Instant, Sleep};

/// Any duplex byte stream a session can run over.
pub trait ByteStream: AsyncRead + AsyncWrite + Send + Unpin {}
impl<T: AsyncRead + AsyncWrite + Send + Unpin> ByteStream for T {}

/// A boxed link.
pub type Link = Box<dyn ByteStream>;

/// What an instrument sends back for one program message.
#[derive(Debug, Clone, PartialEq)]
pub enum Response {
    /// Nothing (no query in the message, or a reply path that is dead).
    Nothing,
    /// A response message, without terminator.
    Reply(String),
    /// A response message that leaves only after a delay.
    Late(String, Duration),
}

/// Something that answers program messages line by line (an instrument).
pub trait LineResponder: Send {
    /// Handle one message (without its terminator). `Err` means the link
    /// should drop (a simulated disconnect).
    fn respond(&mut self, line: &str) -> Result<Response, io::Error>;
}

/// An in-memory link to a responder.
pub struct InMemoryLink {
    responder: Arc<Mutex<dyn LineResponder>>,
    incoming: Vec<u8>,
    outgoing: VecDeque<u8>,
    /// Late replies, each with the time it may be read.
    held: VecDeque<(Instant, Vec<u8>)>,
    sleep: Option<Pin<Box<Sleep>>>,
    reader: Option<Waker>,
    closed: bool,
}

impl InMemoryLink {
    pub fn new(responder: Arc<Mutex<dyn LineResponder>>) -> InMemoryLink {
        InMemoryLink {
            responder,
            incoming: Vec::new(),
            outgoing: VecDeque::new(),
            held: VecDeque::new(),
            sleep: None,
            reader: None,
            closed: false,
        }
    }
}

impl AsyncWrite for InMemoryLink {
    fn poll_write(
        mut self: Pin<&mut Self>,
        _cx: &mut Context<'_>,
        buf: &[u8],
    ) -> Poll<io::Result<usize>> {
        if self.closed {
            return Poll::Ready(Err(io::Error::new(
                io::ErrorKind::BrokenPipe,
                "in-memory link closed",
            )));
        }
        self.incoming.extend_from_slice(buf);
        while let Some(pos) = self.incoming.iter().position(|&b| b == b'\n') {
            let line: Vec<u8> = self.incoming.drain(..=pos).collect();
            let text = String::from_utf8_lossy(&line[..line.len() - 1]).into_owned();
            let answer = {
                let mut r = match self.responder.lock() {
                    Ok(g) => g,
                    Err(p) => p.into_inner(),
                };
                r.respond(text.trim_end_matches('\r'))
            };
            match answer {
                Ok(Response::Reply(reply)) => {
                    if self.held.is_empty() {
                        self.outgoing.extend(reply.as_bytes());
                        self.outgoing.push_back(b'\n');
                    } else {
                        // Replies keep their order behind a late one.
                        let at = self.held.back().map(|h| h.0).unwrap_or_else(Instant::now);
                        self.held.push_back((at, line_bytes(reply)));
                    }
                    if let Some(w) = self.reader.take() {
                        w.wake();
                    }
                }
                Ok(Response::Late(reply, delay)) => {
                    let at = Instant::now() + delay;
                    self.held.push_back((at, line_bytes(reply)));
                    if let Some(w) = self.reader.take() {
                        w.wake();
                    }
                }
                Ok(Response::Nothing) => {}
                Err(e) => {
                    self.closed = true;
                    if let Some(w) = self.reader.take() {
                        w.wake();
                    }
                    return Poll::Ready(Err(e));
                }
            }
        }
        Poll::Ready(Ok(buf.len()))
    }

    fn poll_flush(self: Pin<&mut Self>, _cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Poll::Ready(Ok(()))
    }

    fn poll_shutdown(mut self: Pin<&mut Self>, _cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        self.closed = true;
        Poll::Ready(Ok(()))
    }
}

impl AsyncRead for InMemoryLink {
    fn poll_read(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        let now = Instant::now();
        while self.held.front().is_some_and(|h| h.0 <= now) {
            if let Some((_, bytes)) = self.held.pop_front() {
                self.outgoing.extend(bytes);
            }
        }
        if self.outgoing.is_empty() && !self.closed {
            if let Some(&(at, _)) = self.held.front() {
                let mut sleep = Box::pin(tokio::time::sleep_until(at));
                if sleep.as_mut().poll(cx).is_ready() {
                    cx.waker().wake_by_ref();
                }
                self.sleep = Some(sleep);
            }
        }
        if self.outgoing.is_empty() {
            if self.closed {
                return Poll::Ready(Ok(()));
            }
            self.reader = Some(cx.waker().clone());
            return Poll::Pending;
        }
        let n = buf.remaining().min(self.outgoing.len());
        let (a, b) = self.outgoing.as_slices();
        let from_a = n.min(a.len());
        buf.put_slice(&a[..from_a]);
        if n > from_a {
            buf.put_slice(&b[..n - from_a]);
        }
        self.outgoing.drain(..n);
        Poll::Ready(Ok(()))
    }
}

fn line_bytes(reply: String) -> Vec<u8> {
    let mut b = reply.into_bytes();
    b.push(b'\n');
    b
}

/// One link used by two sessions in turn: the source and load roles of a
/// single source-sink instrument. The engine never has two exchanges in
/// flight, so the two sessions cannot interleave on the wire.
#[derive(Clone)]
pub struct SharedLink(pub Arc<Mutex<Link>>);

impl SharedLink {
    pub fn new(link: Link) -> SharedLink {
        SharedLink(Arc::new(Mutex::new(link)))
    }
    fn with<T>(&self, f: impl FnOnce(&mut Link) -> T) -> T {
        let mut g = match self.0.lock() {
            Ok(g) => g,
            Err(p) => p.into_inner(),
        };
        f(&mut g)
    }
}

impl AsyncWrite for SharedLink {
    fn poll_write(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &[u8],
    ) -> Poll<io::Result<usize>> {
        self.with(|l| Pin::new(&mut **l).poll_write(cx, buf))
    }
    fn poll_flush(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        self.with(|l| Pin::new(&mut **l).poll_flush(cx))
    }
    fn poll_shutdown(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        self.with(|l| Pin::new(&mut **l).poll_shutdown(cx))
    }
}

impl AsyncRead for SharedLink {
    fn poll_read(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        self.with(|l| Pin::new(&mut **l).poll_read(cx, buf))
    }
}
