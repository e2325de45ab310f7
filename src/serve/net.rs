//! The socket layer both live servers (HTTP and Modbus) stand on: listening with a deep backlog,
//! the connection cap that fits the open-file limit, and a stream that times out when idle.

use std::io;
use std::net::SocketAddr;
use std::pin::Pin;
use std::task::{Context, Poll};
use std::time::Duration;

use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};

/// Descriptors kept free for everything but connections (database, frames, logs).
const FD_RESERVE: usize = 128;

/// The open-file limit's share left for connections, when the platform tells it.
fn fd_budget() -> Option<usize> {
    #[cfg(unix)]
    {
        let mut r = libc::rlimit { rlim_cur: 0, rlim_max: 0 };
        // SAFETY: getrlimit writes into the struct we pass and reads nothing else.
        let ok = unsafe { libc::getrlimit(libc::RLIMIT_NOFILE, &mut r) } == 0;
        if ok && r.rlim_cur != libc::RLIM_INFINITY {
            return Some(usize::try_from(r.rlim_cur).unwrap_or(usize::MAX).saturating_sub(FD_RESERVE).max(1));
        }
    }
    None
}

/// The connection cap in force: the option, lowered to the open-file budget; with a warning when
/// lowered.
pub fn effective_max_connections(wanted: usize) -> (usize, Option<String>) {
    match fd_budget() {
        Some(b) if b < wanted => (b, Some(format!("max connections lowered from {wanted} to {b} to fit the open-file limit (ulimit -n) less {FD_RESERVE} kept for files"))),
        _ => (wanted, None),
    }
}

/// Pending connections the kernel may hold before they are accepted.
const LISTEN_BACKLOG: i32 = 1024;

/// A listening socket on `addr` with a backlog of [`LISTEN_BACKLOG`] (a burst of clients waits
/// there instead of retrying its handshake a second later).
///
/// # Errors
/// The address cannot be bound.
pub(crate) fn listen(addr: SocketAddr) -> io::Result<std::net::TcpListener> {
    let socket = socket2::Socket::new(socket2::Domain::for_address(addr), socket2::Type::STREAM, Some(socket2::Protocol::TCP))?;
    #[cfg(unix)]
    socket.set_reuse_address(true)?;
    socket.bind(&addr.into())?;
    socket.listen(LISTEN_BACKLOG)?;
    Ok(socket.into())
}

/// A stream that fails with `TimedOut` once no byte has moved either way for its idle time.
pub(crate) struct IdleIo<I> {
    inner: I,
    idle: Duration,
    deadline: Pin<Box<tokio::time::Sleep>>,
}

impl<I> IdleIo<I> {
    pub(crate) fn new(inner: I, idle: Duration) -> Self {
        Self { inner, idle, deadline: Box::pin(tokio::time::sleep(idle)) }
    }

    fn touch(&mut self) {
        let at = tokio::time::Instant::now() + self.idle;
        self.deadline.as_mut().reset(at);
    }

    /// Called when the inner stream is not ready: fail once the idle time has passed.
    fn expired<T>(&mut self, cx: &mut Context<'_>) -> Poll<io::Result<T>> {
        match self.deadline.as_mut().poll(cx) {
            Poll::Ready(()) => Poll::Ready(Err(io::Error::new(io::ErrorKind::TimedOut, "connection idle"))),
            Poll::Pending => Poll::Pending,
        }
    }
}

impl<I: AsyncRead + Unpin> AsyncRead for IdleIo<I> {
    fn poll_read(mut self: Pin<&mut Self>, cx: &mut Context<'_>, buf: &mut ReadBuf<'_>) -> Poll<io::Result<()>> {
        let before = buf.filled().len();
        match Pin::new(&mut self.inner).poll_read(cx, buf) {
            Poll::Ready(Ok(())) => {
                if buf.filled().len() > before {
                    self.touch();
                }
                Poll::Ready(Ok(()))
            }
            Poll::Pending => self.expired(cx),
            other => other,
        }
    }
}

impl<I: AsyncWrite + Unpin> AsyncWrite for IdleIo<I> {
    fn poll_write(mut self: Pin<&mut Self>, cx: &mut Context<'_>, buf: &[u8]) -> Poll<io::Result<usize>> {
        match Pin::new(&mut self.inner).poll_write(cx, buf) {
            Poll::Ready(Ok(n)) => {
                if n > 0 {
                    self.touch();
                }
                Poll::Ready(Ok(n))
            }
            Poll::Pending => self.expired(cx),
            other => other,
        }
    }

    fn poll_flush(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        match Pin::new(&mut self.inner).poll_flush(cx) {
            Poll::Pending => self.expired(cx),
            other => other,
        }
    }

    fn poll_shutdown(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        match Pin::new(&mut self.inner).poll_shutdown(cx) {
            Poll::Pending => self.expired(cx),
            other => other,
        }
    }

    fn poll_write_vectored(mut self: Pin<&mut Self>, cx: &mut Context<'_>, bufs: &[io::IoSlice<'_>]) -> Poll<io::Result<usize>> {
        match Pin::new(&mut self.inner).poll_write_vectored(cx, bufs) {
            Poll::Ready(Ok(n)) => {
                if n > 0 {
                    self.touch();
                }
                Poll::Ready(Ok(n))
            }
            Poll::Pending => self.expired(cx),
            other => other,
        }
    }

    fn is_write_vectored(&self) -> bool {
        self.inner.is_write_vectored()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// One read through the idle guard.
    async fn read_some(io: &mut IdleIo<tokio::net::TcpStream>) -> io::Result<usize> {
        let mut byte = [0u8; 1];
        std::future::poll_fn(|cx| {
            let mut rb = ReadBuf::new(&mut byte);
            Pin::new(&mut *io).poll_read(cx, &mut rb).map_ok(|()| rb.filled().len())
        })
        .await
    }

    #[tokio::test]
    async fn a_stream_where_nothing_moves_is_closed_and_traffic_keeps_it_open() {
        use std::io::Write as _;
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let mut peer = std::net::TcpStream::connect(listener.local_addr().unwrap()).unwrap();
        let (stream, _) = listener.accept().await.unwrap();
        let mut io = IdleIo::new(stream, Duration::from_secs(1));
        // Traffic more often than the idle time: the stream stays open beyond it.
        for _ in 0..30 {
            tokio::time::sleep(Duration::from_millis(50)).await;
            peer.write_all(b"x").unwrap();
            assert_eq!(read_some(&mut io).await.unwrap(), 1);
        }
        // Silence: the next read fails as timed out (the guard turns a hang into a failure).
        let r = tokio::time::timeout(Duration::from_secs(10), read_some(&mut io)).await.expect("idle stream never closed");
        assert_eq!(r.unwrap_err().kind(), io::ErrorKind::TimedOut);
    }
}
