// SMART App Launch 2.0, EHR launch: the EHR opens this page with iss and
// launch; the SMART client discovers the server's endpoints
// (.well-known/smart-configuration) and asks for an authorization code
// with PKCE, as a public client.
import FHIR from "fhirclient";

FHIR.oauth2.authorize({
  clientId: "halite-sodium-course",
  scope: "launch patient/Patient.rs patient/Observation.rs patient/MedicationRequest.rs patient/MedicationAdministration.rs patient/Condition.rs patient/Procedure.rs patient/Medication.rs",
  redirectUri: "index.html",
  pkceMode: "required",
}).catch((e) => {
  document.getElementById("status").textContent = "The launch failed: " + e.message;
});
