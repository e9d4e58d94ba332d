package pglocal

import (
	"context"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"runtime"
	"syscall"
	"time"
)

// killGrace is how long a postmaster gets to finish an immediate shutdown
// before it is killed, when a fast shutdown ran out of time.
const killGrace = 10 * time.Second

// postmaster is a server process this package started and tracks.
type postmaster struct {
	proc *os.Process
	pid  int
	done chan struct{} // closed once the process has exited and been reaped
	err  error         // how it exited; read only after done is closed
}

// launchSpec is everything needed to start a postmaster.
type launchSpec struct {
	path    string
	args    []string
	dir     string
	env     []string
	log     *os.File
	account *account
	// orphanSignal is sent to the postmaster when the thread that started
	// it ends; 0 lets the server outlive this process.
	orphanSignal syscall.Signal
}

// startPostmaster starts the server as a child process in its own session
// (a Ctrl-C meant for this program does not reach it directly) and returns
// once it is running.
//
// The parent-death signal (Pdeathsig) belongs to the OS thread that forked
// the child, not to the process: Linux sends it when that thread exits. The
// Go runtime runs goroutines on whatever thread it likes and ends threads
// whose goroutine exits while locked to them, so a child forked from an
// arbitrary goroutine could be told "your parent died" while this process
// is still alive. Hence a dedicated goroutine locks itself to its thread,
// forks the child and then waits for it; the thread lives exactly as long as
// the child needs it. The goroutine never unlocks, so the runtime ends the
// thread after the child is reaped rather than handing it to other work.
// When this process dies (a killed test binary), every thread goes with it
// and the kernel sends the signal.
func startPostmaster(spec launchSpec) (*postmaster, error) {
	p := &postmaster{done: make(chan struct{})}
	started := make(chan error, 1)
	go func() {
		runtime.LockOSThread()
		defer close(p.done)
		cmd := exec.Command(spec.path, spec.args...)
		cmd.Dir = spec.dir
		cmd.Env = spec.env
		cmd.Stdout = spec.log
		cmd.Stderr = spec.log
		cmd.SysProcAttr = &syscall.SysProcAttr{
			Setsid:     true,
			Pdeathsig:  spec.orphanSignal,
			Credential: spec.account.credential(),
		}
		if err := cmd.Start(); err != nil {
			p.err = err
			started <- err
			return
		}
		p.proc, p.pid = cmd.Process, cmd.Process.Pid
		started <- nil
		p.err = cmd.Wait()
	}()
	if err := <-started; err != nil {
		return nil, fmt.Errorf("pglocal: start %s: %w", spec.path, err)
	}
	return p, nil
}

// exited reports whether the process has ended.
func (p *postmaster) exited() bool {
	select {
	case <-p.done:
		return true
	default:
		return false
	}
}

// shutdown sends sig (SIGINT: fast, SIGQUIT: immediate) and waits for the
// process to exit. When ctx ends first it escalates to an immediate
// shutdown and, after killGrace, to SIGKILL, and reports the ctx error.
// Signals go through the process handle, which cannot reach a different
// process that reused the pid.
func (p *postmaster) shutdown(ctx context.Context, sig syscall.Signal) error {
	if err := p.proc.Signal(sig); err != nil && !errors.Is(err, os.ErrProcessDone) {
		return fmt.Errorf("pglocal: signal postgres (pid %d): %w", p.pid, err)
	}
	select {
	case <-p.done:
		return nil
	case <-ctx.Done():
	}
	_ = p.proc.Signal(syscall.SIGQUIT)
	grace := time.NewTimer(killGrace)
	defer grace.Stop()
	select {
	case <-p.done:
	case <-grace.C:
		_ = p.proc.Kill()
		<-p.done
	}
	return fmt.Errorf("pglocal: postgres (pid %d) had not shut down when %w; it was stopped with an immediate shutdown",
		p.pid, context.Cause(ctx))
}
