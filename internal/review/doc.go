// Package review holds the words an operator reviews an alarm episode with
// (actionable, not-actionable, artefact, unsure), what each means, and the
// checks of a review's label and note. The gateway, the command line, the
// web page and tuning all read them from here, so one list is in force
// (docs/contracts.md, "Episode reviews", says the same in prose).
//
// It imports nothing of pulsefleet.
package review
