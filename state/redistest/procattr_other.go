//go:build !linux

package redistest

import "os/exec"

// dieWithParent does nothing where the kernel offers no parent-death
// signal; Cleanup still stops the server.
func dieWithParent(cmd *exec.Cmd) {}
