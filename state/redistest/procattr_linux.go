package redistest

import (
	"os/exec"
	"syscall"
)

// dieWithParent makes the server die with the test binary, so that a test
// process that is killed or panics leaves no server behind.
func dieWithParent(cmd *exec.Cmd) {
	cmd.SysProcAttr = &syscall.SysProcAttr{Pdeathsig: syscall.SIGKILL}
}
