// Package alertmanager holds an example Alertmanager configuration for
// pulsefleet's alarm notifications (alertmanager.yml). It has no code; its
// Go tests check the file with amtool, test its routing tree with
// `amtool config routes test`, and run it in a real Alertmanager (with the
// receivers pointed at a webhook receiver run by the test) to show that a
// high-priority alarm reaches the pager receiver and inhibits the lower
// alarms of the same device, and that another device's low alarm reaches
// the ward receiver.
package alertmanager
