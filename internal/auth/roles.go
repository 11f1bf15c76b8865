package auth

import (
	"fmt"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Role of an operator credential, ordered by what it allows.
type Role uint8

// Roles. RoleNone is a device credential's (it may only stream).
const (
	RoleNone Role = iota
	RoleViewer
	RoleOperator
	RoleAdmin
)

func (r Role) String() string {
	switch r {
	case RoleViewer:
		return "viewer"
	case RoleOperator:
		return "operator"
	case RoleAdmin:
		return "admin"
	}
	return "none"
}

// ParseRole reads viewer, operator or admin.
func ParseRole(s string) (Role, error) {
	switch s {
	case "viewer":
		return RoleViewer, nil
	case "operator":
		return RoleOperator, nil
	case "admin":
		return RoleAdmin, nil
	}
	return RoleNone, fmt.Errorf("role: %q, want viewer, operator or admin", s)
}

// RoleProto maps a role to the API's.
func RoleProto(r Role) pb.Role {
	switch r {
	case RoleViewer:
		return pb.Role_ROLE_VIEWER
	case RoleOperator:
		return pb.Role_ROLE_OPERATOR
	case RoleAdmin:
		return pb.Role_ROLE_ADMIN
	}
	return pb.Role_ROLE_UNSPECIFIED
}

// RoleFromProto maps the API's role.
func RoleFromProto(r pb.Role) Role {
	switch r {
	case pb.Role_ROLE_VIEWER:
		return RoleViewer
	case pb.Role_ROLE_OPERATOR:
		return RoleOperator
	case pb.Role_ROLE_ADMIN:
		return RoleAdmin
	}
	return RoleNone
}

// Who may call what. Methods not listed need admin (deny by default).
const (
	needDevice = Role(255) // IngestService.Connect: a device (as itself) or admin
)

var methodRoles = map[string]Role{
	pb.IngestService_Connect_FullMethodName: needDevice,

	pb.FleetService_ListDevices_FullMethodName:        RoleViewer,
	pb.FleetService_GetDevice_FullMethodName:          RoleViewer,
	pb.FleetService_QueryTrend_FullMethodName:         RoleViewer,
	pb.FleetService_WatchEvents_FullMethodName:        RoleViewer,
	pb.FleetService_ListEpisodes_FullMethodName:       RoleViewer,
	pb.FleetService_WatchEpisodes_FullMethodName:      RoleViewer,
	pb.FleetService_GetAlarmProfile_FullMethodName:    RoleViewer,
	pb.FleetService_GetDeviceQuality_FullMethodName:   RoleViewer,
	pb.FleetService_ListDeviceQuality_FullMethodName:  RoleViewer,
	pb.FleetService_ExportTrend_FullMethodName:        RoleViewer,
	pb.FleetService_ListReviews_FullMethodName:        RoleViewer,
	pb.FleetService_ListLedgerCoverage_FullMethodName: RoleViewer,
	pb.FleetService_ReviewEpisode_FullMethodName:      RoleOperator,
	pb.FleetService_AcknowledgeAlarm_FullMethodName:   RoleOperator,
	pb.FleetService_PauseAlarms_FullMethodName:        RoleOperator,
	pb.FleetService_SetAlarmProfile_FullMethodName:    RoleAdmin,

	pb.AdminService_ListAudit_FullMethodName:         RoleViewer,
	pb.AdminService_ListCalibrations_FullMethodName:  RoleViewer,
	pb.AdminService_GetStoreStats_FullMethodName:     RoleViewer,
	pb.AdminService_IssueToken_FullMethodName:        RoleAdmin,
	pb.AdminService_ListTokens_FullMethodName:        RoleAdmin,
	pb.AdminService_RevokeToken_FullMethodName:       RoleAdmin,
	pb.AdminService_PutCalibration_FullMethodName:    RoleAdmin,
	pb.AdminService_AssignCalibration_FullMethodName: RoleAdmin,
	pb.AdminService_Backup_FullMethodName:            RoleAdmin,
	pb.AdminService_SetDeviceLabels_FullMethodName:   RoleOperator,

	// Enrolment is a bedside task (operator); deletion destroys data (admin).
	pb.ParticipantService_ListEnrolments_FullMethodName:    RoleViewer,
	pb.ParticipantService_Enrol_FullMethodName:             RoleOperator,
	pb.ParticipantService_EndEnrolment_FullMethodName:      RoleOperator,
	pb.ParticipantService_DeleteParticipant_FullMethodName: RoleAdmin,
}
