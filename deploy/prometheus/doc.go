// Package prometheus holds pulsefleet's Prometheus files: a scrape
// configuration (prometheus.yml), recording and alerting rules (rules/) and
// their promtool unit tests (tests/). It has no code; its Go tests run
// `promtool check config`, `promtool check rules` and `promtool test rules`
// on these files, and `promtool check metrics` on the /metrics of a real
// gateway with devices streaming into it, and check that every pulsefleet_
// series the rules use is one the gateway exposes.
package prometheus
