package analysis

import "syscall"

// lowerThreadPriority sets the nice value of the calling thread to 19, the
// lowest priority (setpriority(2): on Linux, PRIO_PROCESS with a thread id
// applies to that thread only; lowering one's own priority needs no
// privilege). The caller has locked its goroutine to the thread. Failure
// leaves the priority as it was, which is harmless.
func lowerThreadPriority() {
	_ = syscall.Setpriority(syscall.PRIO_PROCESS, syscall.Gettid(), 19)
}
