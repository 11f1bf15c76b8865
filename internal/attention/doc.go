// Package attention orders a fleet by what needs a person first, the one
// rule behind `pulsefleet devices` and the web page's overview (whose
// script, internal/web/webui/fleet.js, implements the same rule and is
// checked against this package in the gateway's Chromium test):
//
//  0. devices with an alarm: high, then medium, then low priority; within
//     a priority the longest announced first;
//  1. technical problems of a current value: the latest point carries an
//     estimator flag (sensor off, no pulse, clipping, motion, resolution)
//     or has no valid SpO2;
//  2. no current value: offline, never sent a value, or the latest value
//     older than the stale age (Stale);
//  3. the rest.
//
// Ties go by device id. Not a certified medical alarm (internal/caution).
package attention
