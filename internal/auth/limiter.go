package auth

import "sync"

// auditLimiter bounds audit entries for refused calls per remote host: at
// most perMinute in each minute (a fixed window per host); the ones left out
// are counted and reported with the host's next entry. It tracks at most
// maxHosts hosts; beyond that, new hosts share one window, so a flood from
// many addresses cannot grow it either. All hosts together get at most
// auditAllHostsFactor times perMinute entries a minute.
type auditLimiter struct {
	mu        sync.Mutex
	perMinute int
	hosts     map[string]*auditWindow
	all       auditWindow
}

type auditWindow struct {
	startMS    int64
	n          int
	suppressed int
}

const (
	auditWindowMS   = 60_000
	auditMaxHosts   = 1024
	auditOtherHosts = "*other hosts*"
	// auditAllHostsFactor: entries a minute from all hosts together, in
	// units of the per-host limit (10 x 10 = 100 entries, some 20 KiB, a minute).
	auditAllHostsFactor = 10
)

func newAuditLimiter(perMinute int) *auditLimiter {
	return &auditLimiter{perMinute: perMinute, hosts: map[string]*auditWindow{}}
}

func (l *auditLimiter) setPerMinute(n int) {
	l.mu.Lock()
	l.perMinute = n
	l.mu.Unlock()
}

// allow reports whether an entry for host may be written now, and how many
// were suppressed for it since its last written entry.
func (l *auditLimiter) allow(host string, nowMS int64) (bool, int) {
	l.mu.Lock()
	defer l.mu.Unlock()
	w := l.hosts[host]
	if w == nil {
		if len(l.hosts) >= auditMaxHosts {
			for h, x := range l.hosts {
				if nowMS-x.startMS >= auditWindowMS && x.suppressed == 0 {
					delete(l.hosts, h)
				}
			}
		}
		if len(l.hosts) >= auditMaxHosts {
			host = auditOtherHosts
			w = l.hosts[host]
		}
		if w == nil {
			w = &auditWindow{startMS: nowMS}
			l.hosts[host] = w
		}
	}
	if nowMS-w.startMS >= auditWindowMS {
		w.startMS, w.n = nowMS, 0
	}
	if nowMS-l.all.startMS >= auditWindowMS {
		l.all.startMS, l.all.n = nowMS, 0
	}
	if w.n >= l.perMinute || l.all.n >= auditAllHostsFactor*l.perMinute {
		w.suppressed++
		return false, 0
	}
	w.n++
	l.all.n++
	s := w.suppressed
	w.suppressed = 0
	return true, s
}
